"""Common machinery of the widgets: loading the ES module + CSS, and the static ``text/html`` fallback."""

from __future__ import annotations

from pathlib import Path

HERE = Path(__file__).parent


def esm(name: str) -> str:
    """The ES module of one widget, with the shared helpers in front (anywidget modules are single strings)."""
    return (HERE / "_shared.js").read_text(encoding="utf-8") + "\n" + (HERE / name).read_text(encoding="utf-8")


def css(name: str) -> str:
    return (HERE / "_shared.css").read_text(encoding="utf-8") + "\n" + (HERE / name).read_text(encoding="utf-8")


class StaticFallback:
    """Adds a static ``text/html`` rendering to the widget's MIME bundle (the views and the :class:`Survey` box).

    A live front end shows the widget; nbconvert, notebook previews and a notebook reopened without a kernel
    (no widget state) fall back to this HTML, so the results stay visible.
    """

    def to_html(self) -> str:  # pragma: no cover - every view overrides it
        raise NotImplementedError

    def _repr_html_(self) -> str:
        return self.to_html()

    def snapshot(self):
        """The static rendering as a plain HTML output (no widget): it stays visible when a notebook is
        reopened in JupyterLab without a kernel, where a widget output shows only an error."""
        from IPython.display import HTML
        return HTML(self.to_html())

    def _repr_mimebundle_(self, **kwargs):
        bundle = super()._repr_mimebundle_(**kwargs)
        data, meta = bundle if isinstance(bundle, tuple) else (bundle, {})
        data = dict(data or {})
        data["text/html"] = self.to_html()
        return data, meta
