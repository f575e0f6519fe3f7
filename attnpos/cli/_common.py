"""What the sub-commands share: their common arguments, and the checks that run before any model is loaded.

Every check here is cheap and needs neither torch nor a model: a bad argument is refused in well under a second,
before minutes of work (and before an output file could be half written)."""

from __future__ import annotations

import argparse
import os
from pathlib import Path

from ..errors import AttnposError


def count(minimum: int):
    """An argparse type: a whole number of at least ``minimum`` (argparse turns the error into a usage message)."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"{value} is too small: give at least {minimum}")
        return value
    return parse


def positive_number(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"{value:g} must be above 0")
    return value


# ------------------------------------------------------------------------------------------------ arguments

def add_model_arguments(p: argparse.ArgumentParser, default: str | None = "ref:rope", name: str = "model") -> None:
    p.add_argument(name, nargs="?" if default else None, default=default,
                   help="model folder (config.json + *.safetensors), ref:<scheme>, a hub id org/name in the "
                        "local hub cache, or a .gguf file" +
                        (f" (default {default})" if default else ""))
    p.add_argument("--scheme", default=None,
                   help="state the position scheme by hand (one name, or comma-separated per layer): "
                        "learned-absolute, sinusoidal, relative-bias, alibi, rope, none")
    add_loading_arguments(p)


def add_loading_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--allow-pickle", action="store_true",
                   help="also load pickle (*.bin) weights, with torch's weights_only restriction")
    p.add_argument("--trust-remote-code", action="store_true",
                   help="run modelling code shipped inside the model folder (only for folders you trust)")
    from ..core.settings import DTYPES

    p.add_argument("--dtype", choices=DTYPES, default=DTYPES[0],
                   help="keep the weights in this dtype (attention scores are always computed in float32; "
                        f"default {DTYPES[0]})")
    p.add_argument("--allow-missing-weights", action="store_true",
                   help="go on when the weights lack tensors the config needs (or hold them in another shape): "
                        "they stay random, and the results record which")


def add_text_arguments(p: argparse.ArgumentParser, windows: bool = True) -> None:
    p.add_argument("--text", action="append", type=Path, default=None, metavar="PATH",
                   help="a .txt file (one text) or a folder (each .txt a text); repeatable; default: the bundled "
                        "sample texts")
    p.add_argument("--lines", action="store_true", help="make each non-empty line its own text")
    if windows:
        p.add_argument("--max-tokens", type=count(1), default=None, metavar="N",
                       help="split texts into windows of at most N tokens (default: the model's context limit)")


def add_long_text_arguments(p: argparse.ArgumentParser, sequences: int, sequences_help: str) -> None:
    """``--text``, ``--training-length`` and ``--sequences`` of the commands that read long sequences (length,
    stretch)."""
    p.add_argument("--text", action="append", type=Path, default=None, metavar="PATH",
                   help="a .txt file or a folder of them, joined and cut into sequences of N tokens; repeatable; "
                        "default: freshly generated documents of the reference corpus scenarios")
    p.add_argument("--training-length", type=count(1), default=None, metavar="L",
                   help="the context length the model was trained on (default: recorded with the model or config)")
    p.add_argument("--sequences", type=count(1), default=sequences, metavar="K", help=sequences_help)


def add_json_argument(p: argparse.ArgumentParser, what: str) -> None:
    p.add_argument("--json", type=Path, default=None, metavar="OUT", help=f"write the {what} as JSON")


# ------------------------------------------------------------------------------------------------ checks

def check_model(args, name: str = "model"):
    """The model argument points at a loadable checkpoint (folder, config, weights, no shipped code unless
    allowed) and ``--scheme`` names schemes: see :mod:`attnpos.locate`."""
    from ..core import schemes
    from ..locate import locate

    if getattr(args, "scheme", None):
        for w in args.scheme.split(","):
            if schemes.get(w.strip()) is None:
                raise AttnposError(f"Unknown scheme {w.strip()!r} for --scheme; choose from "
                                   f"{', '.join(schemes.names())}.")
    found = locate(getattr(args, name), allow_pickle=getattr(args, "allow_pickle", False),
                   trust_remote_code=getattr(args, "trust_remote_code", False))
    args.located = getattr(args, "located", None) or {}
    args.located[name] = found
    return found


def config_shape(cfg: dict) -> tuple[int | None, int | None]:
    """(layers, heads) of a transformers config as config.json states them (the usual key names; None when the
    config names them otherwise), read without transformers."""
    inner = cfg.get("text_config") if isinstance(cfg.get("text_config"), dict) else cfg
    layers = next((inner[k] for k in ("num_hidden_layers", "n_layer", "num_layers", "n_layers") if
                   isinstance(inner.get(k), int)), None)
    heads = next((inner[k] for k in ("num_attention_heads", "n_head", "num_heads", "n_heads") if
                  isinstance(inner.get(k), int)), None)
    return layers, heads


def announce(args, command: str, name: str = "model") -> None:
    """The first line of a command that loads a model: what it loads, from where (stderr, before torch is
    imported, which alone takes seconds)."""
    import sys

    found = (getattr(args, "located", None) or {}).get(name)
    where = f" from {found.path}" if found is not None and not found.reference else ""
    print(f"attnpos {command}: loading {getattr(args, name)}{where} (torch, transformers and the weights: a few "
          "seconds)", file=sys.stderr, flush=True)


def read_texts(args):
    """The texts of ``--text`` / ``--lines`` (or the bundled samples), read now: a missing or unreadable file is
    refused before the model loads."""
    from ..texts import default_texts, read

    return read(args.text, lines=args.lines) if args.text else default_texts()


def _same(a: Path, b: Path) -> bool:
    try:
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def _input_files(value) -> list[Path]:
    """The files an input argument reads: a file itself; for a folder, the files inside it (``suffix``-filtered for
    text folders by the caller)."""
    items = [value] if isinstance(value, (str, Path)) else list(value)
    out = []
    for item in items:
        p = Path(item).expanduser()
        if p.is_dir():
            with_suffix = getattr(value, "suffix_filter", None)
            out += [f for f in p.iterdir() if f.is_file() and (with_suffix is None or f.suffix == with_suffix)]
        out.append(p)
    return out


def check_outputs(outputs: dict[str, Path | None], inputs: dict[str, Path | None] | None = None) -> None:
    """Each output path can be written (its folder exists, it is not a folder, not read-only, not a findings file
    that is not the output's own kind), no two outputs are the same file, and no output is one of the inputs (a
    findings file, a text, a file of the model folder). Inputs that are folders stand for every file in them."""
    from ..files import check_writable

    outs = {flag: Path(p) for flag, p in outputs.items() if p is not None}
    for flag, path in outs.items():
        if path.is_dir():
            raise AttnposError(f"{path} is a folder; {flag} takes a file path (e.g. {path / 'out'}"
                               f"{'.html' if 'html' in flag else '.json'}).")
        folder = path.expanduser().absolute().parent
        if not folder.is_dir():
            raise AttnposError(f"The folder {folder} for {flag} does not exist. Create it first, or give a path in an "
                               "existing folder.")
    items = list(outs.items())
    for i, (fa, pa) in enumerate(items):
        for fb, pb in items[i + 1:]:
            if _resolved(pa) == _resolved(pb) or _same(pa, pb):
                raise AttnposError(f"{fa} and {fb} name the same file ({pa}); give each its own path.")
    for fi, pi in (inputs or {}).items():
        if pi is None:
            continue
        for pin in _input_files(pi):
            for fo, po in outs.items():
                if _resolved(po) == _resolved(pin) or _same(po, pin):
                    raise AttnposError(f"{fo} would overwrite {pin}, which is an input ({fi}); write to another "
                                       "path.")
    for flag, path in outs.items():
        try:
            check_writable(path.expanduser())
        except AttnposError as exc:
            raise AttnposError(f"{flag}: {exc}") from None


def _resolved(p: Path) -> Path:
    """The absolute path with links and ``..`` resolved (a missing file resolves through its folder)."""
    try:
        return Path(p).expanduser().resolve()
    except (OSError, RuntimeError):
        return Path(p).expanduser().absolute()


class TextInputs(list):
    """``--text`` paths as an input of :func:`check_outputs`: a folder stands for its ``.txt`` files only."""

    suffix_filter = ".txt"


def model_files(located) -> list[Path]:
    """The files of a located model folder, as inputs of :func:`check_outputs`."""
    return [located.path]


def scheme_argument(args):
    """``--scheme`` as attnpos.load takes it: one name, or a list per layer."""
    s = getattr(args, "scheme", None)
    return s.split(",") if s and "," in s else s


def load_subject(args, name: str = "model"):
    from ..subject import load

    return load(getattr(args, name), scheme=scheme_argument(args), allow_pickle=args.allow_pickle,
                trust_remote_code=args.trust_remote_code, dtype=getattr(args, "dtype", "float32"),
                allow_missing_weights=args.allow_missing_weights)


def write(what: str, path: Path, save) -> None:
    """Run ``save()``; a failure to write becomes a clear error (the file itself is written atomically)."""
    try:
        save()
    except OSError as exc:
        raise AttnposError(f"Could not write the {what} to {path} ({exc.strerror or exc}). Check free space and "
                           "permissions, then try again.") from None
    print(f"wrote {path}")
