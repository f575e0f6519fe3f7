"""Common machinery of the widgets: loading the ES module + CSS, and the static ``text/html`` fallback."""

from __future__ import annotations

from pathlib import Path

HERE = Path(__file__).parent


def esm(name: str) -> str:
    """The ES module of one widget, with the shared helpers in front (anywidget modules are single strings)."""
    return (HERE / "_shared.js").read_text(encoding="utf-8") + "\n" + (HERE / name).read_text(encoding="utf-8")


def script(*names: str) -> str:
    """The shared helpers and the named modules as one classic script (their ``export`` lines dropped), for a
    page that runs them directly (the standalone report)."""
    parts = [(HERE / "_shared.js").read_text(encoding="utf-8")]
    for name in names:
        text = (HERE / name).read_text(encoding="utf-8")
        parts.append("\n".join(line for line in text.splitlines() if not line.startswith("export default")))
    return "\n".join(parts)


def css(name: str) -> str:
    return (HERE / "_shared.css").read_text(encoding="utf-8") + "\n" + (HERE / name).read_text(encoding="utf-8")


# Above this many heads the atlas's SVG (one mark and one word per head) outweighs its PNG several times over; the
# display bundle then carries the PNG only (``view.save("atlas.svg")`` still writes the SVG).
BUNDLE_SVG_MAX_HEADS = 256


class StaticFallback:
    """Adds static renderings to the widget's MIME bundle (the views and the :class:`Survey` box), so a notebook
    shows results wherever it is read:

    - ``image/png`` and ``image/svg+xml``: a matplotlib picture of the same content (:meth:`figure`, drawn from
      :mod:`attnpos.views.data`, as the widget is);
    - ``text/html``: that picture as an inline image with a short summary and the caution — what an untrusted
      JupyterLab (which sanitises HTML and strips SVG and styles), ``nbconvert --to html`` without widget state
      and a repository's notebook preview show;
    - ``text/markdown`` and ``text/plain``: the summary in words.

    A live front end shows the widget. :meth:`to_html` is the richer static HTML (hover text, inline SVG) that the
    standalone report is built from, and :meth:`snapshot` shows it as a plain output.
    """

    def to_html(self) -> str:  # pragma: no cover - every view overrides it
        raise NotImplementedError

    def figure(self):
        """The view as a matplotlib figure (None when there is nothing to draw). A view without one still shows
        its static HTML in the bundle."""
        return None

    def summary(self) -> tuple[str, list[str]] | None:
        """A title and a few lines of plain text saying what the view shows (None: the bundle's HTML is
        :meth:`to_html`, as before views had pictures)."""
        return None

    def _caution_text(self) -> str:
        scan = getattr(self, "scan", None)
        return (getattr(scan, "caution", "") or "") if scan is not None else ""

    def _repr_html_(self) -> str:
        return self.to_html()

    def snapshot(self):
        """The static rendering as a plain HTML output (no widget): it stays visible when a notebook is
        reopened in JupyterLab without a kernel, where a widget output shows only an error."""
        from IPython.display import HTML
        return HTML(self.to_html())

    def save(self, path):
        """Write the view as a picture for a paper or a slide: ``view.save("atlas.pdf")`` (``.png``, ``.svg`` or
        ``.pdf``, chosen by the suffix; colour-blind-safe colours, every role also written as a word or code).
        Returns the path."""
        from . import figures
        fig = self.figure()
        if fig is None:
            from ..errors import AttnposError
            raise AttnposError(f"This {type(self).__name__} has nothing to draw yet (nothing was measured, or no "
                               "head is selected), so there is no picture to save.")
        return figures.save(fig, path)

    def static_bundle(self) -> dict:
        """The static part of the display bundle (no widget): PNG, SVG, HTML, Markdown and plain text."""
        import base64

        from .common import esc_plain

        said = self.summary()
        if said is None:
            return {"text/html": self.to_html()}
        title, lines = said
        caution = self._caution_text()
        png, svg = self._pictures()
        out = {"text/plain": "\n".join([title] + [f"  {x}" for x in lines] + ([f"Caution: {caution}"] if caution else []))}
        md = [f"**{_md(title)}**", ""] + [f"- {_md(x)}" for x in lines]
        if caution:
            md += ["", f"> **Caution.** {_md(caution)}"]
        out["text/markdown"] = "\n".join(md)
        img = ""
        if png:
            b64 = base64.b64encode(png).decode("ascii")
            out["image/png"] = b64
            img = f'<img alt="{esc_plain(title)}" src="data:image/png;base64,{b64}" style="max-width:100%"/>'
        if svg:
            out["image/svg+xml"] = svg
        out["text/html"] = (f'<div class="attnpos-static"><p><b>{esc_plain(title)}</b></p>{img}<ul>'
                            + "".join(f"<li>{esc_plain(x)}</li>" for x in lines) + "</ul>"
                            + (f"<p><b>Caution.</b> {esc_plain(caution)}</p>" if caution else "") + "</div>")
        return out

    def _pictures(self) -> tuple[bytes, str]:
        from . import figures
        fig = self.figure()
        if fig is None:
            return b"", ""
        svg = figures.svg_text(fig) if self._bundle_svg() else ""
        return figures.png_bytes(fig), svg

    def _bundle_svg(self) -> bool:
        scan = getattr(self, "scan", None)
        return scan is None or len(scan.heads) <= BUNDLE_SVG_MAX_HEADS

    def _repr_mimebundle_(self, **kwargs):
        bundle = super()._repr_mimebundle_(**kwargs)
        data, meta = bundle if isinstance(bundle, tuple) else (bundle, {})
        data = dict(data or {})
        data.update(self.static_bundle())
        return data, meta


def _md(text: str) -> str:
    """Plain text safe inside Markdown: the characters Markdown (and its HTML) would act on are escaped."""
    out = []
    for ch in str(text):
        if ch in "\\`*_{}[]()<>#+!|~&":
            out.append("&#%d;" % ord(ch) if ch in "<>&" else "\\" + ch)
        elif ch in "\n\r\t":
            out.append(" ")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F or 0x80 <= ord(ch) < 0xA0 or 0x202A <= ord(ch) <= 0x202E:
            out.append("\\\\x%02x" % ord(ch) if ord(ch) < 0x100 else "\\\\u%04x" % ord(ch))
        else:
            out.append(ch)
    return "".join(out)
