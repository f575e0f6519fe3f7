"""The contracts every result and every reducer keeps, checked on each of them (in the spirit of a shared estimator
check).

Results (:mod:`attnpos.core.protocol`): a JSON round trip that changes nothing, a file round trip through an
atomic write, ``table()`` a DataFrame, ``text()`` and ``_repr_html_()`` with the caution, :func:`load` finding the
right class by the schema, refusals of other kinds and newer versions, and files written by the previous version
(``tests/data/previous``) still loading with their numbers.

Reducers (:class:`attnpos.capture.Reducer`): the same statistics whatever the head chunking and row blocking of
the capture, the capture's tensors never modified, and no reference to them kept after ``update``.

No external check here: the package's own contracts.
"""

from __future__ import annotations

import html
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch

import attnpos
from attnpos import capture as capture_mod
from attnpos.core import protocol
from attnpos.errors import AttnposError

import tiny

PREVIOUS = Path(__file__).resolve().parent / "data" / "previous"
TEXTS = ["The ferry to the north island leaves at nine and returns at four, unless the wind turns.",
         "Our bakery opens at six; the rye loaves come out first, then the seed rolls and the buns.",
         "At the lighthouse the keeper logs the weather twice a day and winds the clock every Sunday."]


# ------------------------------------------------------------------------------------------------ results

@pytest.fixture(scope="module")
def results():
    from attnpos import ablation, bands, compare, induction, length, probes, shift, split, stretching
    from attnpos.reducers import SplitStats
    from attnpos.texts import as_raw, prepare

    rope = tiny.reference("rope")
    units = prepare(rope, as_raw(TEXTS))
    scan = attnpos.scan(rope, TEXTS, n_boot=10)
    out = {
        "scan": scan,
        "split": split.Split(n_boot=10).fit(attnpos.record(rope, units=units, reducers=[SplitStats()])),
        "shift": shift.ShiftTest().run(rope, units),
        "induction": induction.induction_scores(rope, repeats=2),
        "probe": probes.probe(tiny.reference("none"), TEXTS * 2, folds=2, bands=False),
        "length": length.length(rope, TEXTS * 6, to=160, n_sequences=4, n_boot=10),
        "bands": bands.rope_bands(rope, TEXTS),
        "ablation": ablation.ablate(rope, ["L0.H1", "L1.H2"], TEXTS, n_boot=10),
        "compare": compare.compare_scans(scan, attnpos.scan(rope, TEXTS[:2], n_boot=10), all_heads=True),
        "stretch": stretching.stretch(rope, TEXTS * 6, to=160, scalings=["linear:2", "yarn:2"], n_sequences=3,
                                      n_boot=10),
    }
    from attnpos.results.sweep import SweepResult

    untrained = attnpos.from_model(tiny.build("llama", layers=2, heads=4), tiny.tokenizer(), name="tiny-llama")
    early = attnpos.scan(untrained, TEXTS[:1], n_boot=0, shift=False)
    later = attnpos.scan(untrained, TEXTS[:2], n_boot=0, shift=False)
    out["sweep"] = SweepResult.from_scans([(0, early), (50, later)],
                                          loss={"run": {"source": "made here", "step": [10, 50], "loss": [4.1, 2.9]}})
    scan.attach(out["length"])
    return out


def test_every_registered_kind_is_covered(results):
    assert sorted(results) == protocol.kinds()


@pytest.mark.parametrize("kind", protocol.kinds())
def test_json_round_trip_changes_nothing(results, kind):
    res = results[kind]
    data = res.to_json()
    assert data["schema"] == f"attnpos.{kind}/{type(res).version}"
    text = json.dumps(data, allow_nan=False)                # strictly JSON: no NaN or Infinity
    again = type(res).from_json(json.loads(text))
    assert type(again) is type(res)
    assert again.to_json() == data


@pytest.mark.parametrize("kind", protocol.kinds())
def test_file_round_trip_and_load_by_schema(results, kind, tmp_path):
    res = results[kind]
    path = res.save(tmp_path / f"{kind}.json")
    assert [p.name for p in tmp_path.iterdir()] == [f"{kind}.json"]        # the atomic write left no temporary
    again = protocol.load(path)
    assert type(again) is type(res) and again.to_json() == res.to_json()
    assert type(res).load(path).to_json() == res.to_json()


@pytest.mark.parametrize("kind", protocol.kinds())
def test_table_text_and_notebook_display(results, kind):
    res = results[kind]
    t = res.table()
    assert isinstance(t, pd.DataFrame) and len(t) > 0
    assert res.caution and "evidence" in res.caution or "decoded" in res.caution or "ablation" in res.caution
    assert res.caution in res.text()
    shown = res._repr_html_()
    assert "<table" in shown and html.escape(res.caution) in shown
    assert kind in repr(res) or type(res).__name__ in repr(res)


@pytest.mark.parametrize("kind", protocol.kinds())
def test_other_kinds_and_newer_versions_are_refused(results, kind):
    res = results[kind]
    data = res.to_json()
    other = next(k for k in protocol.kinds() if k != kind)
    with pytest.raises(AttnposError, match="load_result"):
        type(res).from_json({**data, "schema": f"attnpos.{other}/1"})
    with pytest.raises(AttnposError, match="newer"):
        type(res).from_json({**data, "schema": f"attnpos.{kind}/{type(res).version + 1}"})
    with pytest.raises(AttnposError):
        type(res).from_json({"schema": data["schema"]})          # nothing but the schema: damaged, said plainly
    with pytest.raises(AttnposError):
        protocol.load({"hello": "world"})


def test_attached_results_travel_with_the_scan(results, tmp_path):
    scan = results["scan"]
    path = scan.save(tmp_path / "scan.json")
    again = attnpos.Scan.load(path)
    assert sorted(again.attached) == ["length"]
    assert again.attached["length"].to_json() == results["length"].to_json()
    from attnpos.views import data as _data

    assert _data.curves_data(again)["length"] is not None
    other = tiny.subject("llama")
    from attnpos.results.length import LengthResult

    foreign = LengthResult.from_json({**results["length"].to_json(),
                                      "model": {**results["length"].model, "fingerprint": other.fingerprint}})
    with pytest.raises(AttnposError, match="another checkpoint"):
        scan.attach(foreign)


# ------------------------------------------------------------------------------------------------ previous version

def test_previous_scan_file_loads_with_its_heads():
    data = json.loads((PREVIOUS / "scan-v1.json").read_text())
    scan = attnpos.Scan.load(PREVIOUS / "scan-v1.json")
    assert len(scan.heads) == len(data["heads"]) == 16
    assert list(scan.heads["role"]) == [h["role"] for h in data["heads"]]
    np.testing.assert_allclose(scan.heads["mass_previous"], [h["mass"]["previous"] for h in data["heads"]])
    assert scan.profile["value"].shape[0] == 16
    assert scan.to_json()["schema"] == "attnpos.scan/3"


def test_previous_scan_v2_file_loads_and_lacks_only_the_new_fields():
    data = json.loads((PREVIOUS / "scan-v2.json").read_text())
    assert data["schema"] == "attnpos.scan/2"
    scan = attnpos.Scan.load(PREVIOUS / "scan-v2.json")
    assert list(scan.heads["role"]) == [h["role"] for h in data["heads"]]
    np.testing.assert_allclose(scan.heads["share_residual"], [h["shares"]["residual"] for h in data["heads"]])
    assert scan.heads["share_pair"].isna().all() and scan.heads["shift_kind"].eq("position-ids").all()
    again = attnpos.Scan.from_json(scan.to_json())
    assert again.to_json()["schema"] == "attnpos.scan/3" and list(again.heads["role"]) == list(scan.heads["role"])


def test_previous_induction_v1_file_loads_without_an_interval():
    data = json.loads((PREVIOUS / "induction-v1.json").read_text())
    res = protocol.load(PREVIOUS / "induction-v1.json")
    assert res.stderr == {} and res.per_sequence == {}
    np.testing.assert_allclose(list(res.scores.values())[0], data["scores"]["values"][0])


def test_previous_shift_v1_file_loads_as_one_shift():
    data = json.loads((PREVIOUS / "shift-v1.json").read_text())
    res = protocol.load(PREVIOUS / "shift-v1.json")
    assert res.kinds == [data["shift_kind"]] and res.spread is None
    first = res.changes[data["shift_kind"]]
    np.testing.assert_allclose(list(first.values())[0], data["change"]["values"][0])
    assert [res.verdict[k] for k in res.change] == data["verdict"]


@pytest.mark.parametrize("kind", ["probe", "length", "bands", "compare", "ablation"])
def test_previous_result_files_load_as_their_class(kind):
    data = json.loads((PREVIOUS / f"{kind}-v1.json").read_text())
    res = protocol.load(PREVIOUS / f"{kind}-v1.json")
    assert res.result_kind == kind
    t = res.table()
    assert len(t) > 0
    if kind == "probe":
        assert [r["r2"] for r in res.layers] == [r["r2"] for r in data["layers"]]
        assert res.model["name"] == data["subject"]["name"]
    elif kind == "length":
        assert res.loss == data["loss"] and res.model["fingerprint"] == data["subject"]["fingerprint"]
    elif kind == "bands":
        assert [h["shares"] for h in res.heads] == [h["shares"] for h in data["heads"]]
    elif kind == "compare":
        assert res.summary == data["summary"] and len(t) == len(data["heads"])
    else:
        assert list(t["key"]) == [h["key"] for h in data["heads"]]


# ------------------------------------------------------------------------------------------------ reducers

def _reducers():
    from attnpos import bands, induction, length, reducers, shift, stretching

    return {
        "weights": lambda: reducers.WeightStats(),
        "split": lambda: reducers.SplitStats(),
        "position-curves": lambda: length.PositionCurves(np.array([0, 8, 24, 64, 200])),
        "range-weights": lambda: length.RangeWeights(12),
        "bands": lambda: bands.BandEnergy(),
        "induction": lambda: induction._Induction(8, 1),
        "shift-base": lambda: shift._Keep(),
        "stretch-stats": lambda: stretching.HeadRangeStats(12, stretching.profile_edges(64), 6),
    }


class _Guard(capture_mod.Reducer):
    """Placed before and after the reducer under test: the capture's tensors must not change in between, and the
    reducer may keep no reference to them."""

    name = "guard"

    def __init__(self, log, role):
        self.log, self.role = log, role

    def update(self, cap):
        z = cap.zeroed_scores()
        self.log.append((self.role, id(cap), float(cap.weights.double().sum()), float(z.double().sum()),
                         (cap.weights.data_ptr(), z.data_ptr())))


def _tensors_in(obj, seen=None, depth=0):
    seen = seen if seen is not None else set()
    if id(obj) in seen or depth > 6:
        return []
    seen.add(id(obj))
    if isinstance(obj, torch.Tensor):
        return [obj]
    if isinstance(obj, dict):
        items = list(obj.values())
    elif isinstance(obj, (list, tuple, set)):
        items = list(obj)
    elif hasattr(obj, "__dict__") and not isinstance(obj, type):
        items = list(vars(obj).values())
    else:
        return []
    out = []
    for x in items:
        out += _tensors_in(x, seen, depth + 1)
    return out


def _same(a, b):
    if isinstance(a, dict):
        return set(a) == set(b) and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, torch.Tensor):                  # float16 keeps about 3 digits
        tol = 2e-3 if a.dtype == torch.float16 else 1e-5
        return torch.allclose(a.float(), b.float(), atol=tol, equal_nan=True)
    if isinstance(a, np.ndarray):                    # float32 sums in another order: relative to the array's scale
        scale = float(np.nanmax(np.abs(a))) if a.size and np.isfinite(a).any() else 1.0
        return a.shape == b.shape and np.allclose(a, b, rtol=1e-5, atol=1e-5 + 1e-6 * scale, equal_nan=True)
    if hasattr(a, "__dict__") and type(a).__module__.startswith("attnpos"):
        return _same({k: v for k, v in vars(a).items() if not k.startswith("_")},
                     {k: v for k, v in vars(b).items() if not k.startswith("_")})
    if isinstance(a, float):
        return (np.isnan(a) and np.isnan(b)) or abs(a - b) < 1e-5
    return a == b


@pytest.mark.parametrize("name", sorted(_reducers()))
def test_reducer_is_independent_of_chunking_and_leaves_the_capture_alone(name, monkeypatch):
    s = tiny.reference("rope")
    texts = [TEXTS[0] * 3, TEXTS[1] * 2]
    make = _reducers()[name]
    whole = attnpos.record(s, texts, [make()]).results[name]
    # every head its own chunk, rows in blocks of 7: the same statistics
    monkeypatch.setattr(capture_mod, "CHUNK_BYTES", 1)
    monkeypatch.setattr(capture_mod, "ROW_BLOCK", 7)
    log: list = []
    red = make()
    kept: list = []

    class Watch(capture_mod.Reducer):
        name = "watch"

        def update(self, cap):
            ptrs = {cap.weights.data_ptr(), cap.zeroed_scores().data_ptr()}
            kept.extend(t for t in _tensors_in(red) if t.numel() and t.data_ptr() in ptrs)

    chunked = attnpos.record(s, texts, [_Guard(log, "before"), red, _Guard(log, "after"), Watch()]).results[name]
    assert _same(whole, chunked), f"{name}: results depend on chunking"
    assert len(log) % 2 == 0 and log
    for before, after in zip(log[0::2], log[1::2]):
        assert before[1:] == after[1:], f"{name} modified the capture's tensors"
    assert not kept, f"{name} keeps references to the capture's tensors"
