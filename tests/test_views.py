"""The notebook views, on the Python side: widget state holds what the scan holds, selection links the atlas to
the card, findings go through the store and mark the views, static HTML escapes user text, payloads stay small.

Scans here are synthetic (``attnpos.views.synthetic``): random but shaped like real ones, so the checks compare
widget state against the scan's own head table rather than against numbers written into the test.
"""

from __future__ import annotations

import json
import math
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from ipywidgets.widgets.widget import _remove_buffers

from attnpos.errors import AttnposError
from attnpos.core.protocol import CAUTION
from attnpos.views import Atlas, Curves, FindingsPanel, HeadCard, Survey, head_key, parse_key, show_token
from attnpos.views import common as _common, data as _data, static
from attnpos.views.synthetic import HOSTILE_TOKENS, synthetic_scan

HOSTILE = "<script>alert(1)</script>"
HOSTILE_IMG = "\"><img src=x onerror=alert(1)>"


class _Tags(HTMLParser):
    """Collects the elements an HTML string really creates (what a browser's parser would build)."""

    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def elements(html: str) -> list[tuple[str, dict]]:
    p = _Tags()
    p.feed(html)
    return p.tags


def assert_no_injection(html: str) -> None:
    tags = elements(html)
    assert not [t for t, _ in tags if t == "script"], "a <script> element was created"
    assert not [a for t, a in tags if t == "img" and a.get("src") == "x"], "an injected <img> was created"
    assert not [a for _, a in tags if "onerror" in a], "an onerror attribute was created"
    assert "\x1b" not in html and "\x00" not in html and "\x07" not in html


# ------------------------------------------------------------------ atlas
def test_atlas_state_holds_the_head_table():
    scan = synthetic_scan(5, 3, seed=3, missing=0.2)
    atlas = Atlas(scan)
    t = scan.heads.reset_index(drop=True)
    dec = atlas.decoded()
    n_cols = atlas.grid["n_cols"]
    assert n_cols == 3 and len(atlas.grid["rows"]) == 5
    for i, r in t.iterrows():
        row, col = divmod(int(dec["cells"][i]), n_cols)
        assert atlas.grid["rows"][row]["layer"] == r["layer"] and col == r["head"]
        assert atlas.head_keys[i] == head_key(r["stack"], r["layer"], r["head"])
        role_id = int(dec["roles"][i])
        assert (_common.roles_now()[role_id - 1] if role_id else None) == r["role"]
        for k, field in enumerate(atlas.grid["fields"]):
            # "faded" is derived from the role's support (views.data.uncertain_roles), the rest are table columns
            want = float(r[field]) if field in t.columns else float(_data.uncertain_roles(t.iloc[[i]])[0])
            got = float(dec["numbers"][i, k])
            if math.isnan(want):
                assert math.isnan(got), (field, i)
            else:
                assert got == pytest.approx(want, rel=1e-6, abs=1e-7), (field, i)
        assert atlas.evidence[i] == r["evidence"]
        assert atlas.tags[i] == ", ".join(r["tags"])
        assert atlas.verdicts[i] == r["shift_verdict"]
    assert atlas.caution == scan.caution == CAUTION


def test_atlas_sparkline_follows_the_profile_in_distance_order():
    scan = synthetic_scan(2, 2, seed=1, missing=0)
    d = scan.profile["distance"]
    # shuffle the bucket order and give head 0 a profile that falls with distance
    perm = np.random.default_rng(0).permutation(len(d))
    scan.profile = {k: (v[perm] if k == "distance" else v[:, perm]) for k, v in scan.profile.items()}
    scan.profile["value"][0] = -scan.profile["distance"]
    atlas = Atlas(scan)
    spark = atlas.decoded()["spark"][0].astype(int)
    assert spark[0] == 254 and spark[-1] == 0
    assert np.all(np.diff(spark) <= 0), spark
    assert list(atlas.grid["spark_distance"]) == sorted(atlas.grid["spark_distance"])


def test_atlas_leaves_out_distances_no_head_has():
    scan = synthetic_scan(2, 2, seed=2, missing=0, causal=True)
    d = scan.profile["distance"]
    extra = -np.arange(1, 6, dtype=float)            # δ < 0: never measured in a causal model
    scan.profile = {"distance": np.concatenate([d, extra]),
                    **{k: np.concatenate([scan.profile[k], np.full((4, 5), np.nan)], axis=1)
                       for k in ("value", "low", "high")}}
    h = _data.head_info(scan, "L0.H0")
    assert (h["distance"] >= 0).all() and len(h["distance"]) == len(d)
    assert (Atlas(scan).decoded()["spark"] != 255).all()


def test_atlas_payload_of_32x32_heads_is_under_one_megabyte():
    scan = synthetic_scan(32, 32, seed=5, keep_maps=0, n_texts=1)
    atlas = Atlas(scan)
    state = atlas.get_state()
    state, _paths, buffers = _remove_buffers(state)
    size = len(json.dumps(state).encode()) + sum(len(b) for b in buffers)
    assert size <= 1_000_000, size
    # the numbers really travel as binary buffers, not as JSON lists of floats
    n = len(scan.heads)
    assert sum(len(b) for b in buffers) >= n * len(_data.ATLAS_FIELDS) * 4
    assert "numbers" not in state and "spark" not in state


def test_missing_numbers_show_as_a_dash_and_do_not_crash():
    scan = synthetic_scan(2, 2, seed=4, missing=0)
    num_cols = [c for c in scan.heads.columns if c.startswith(("share", "mass", "slope", "entropy", "anchor", "induction"))]
    scan.heads.loc[0, num_cols] = np.nan
    scan.heads.loc[0, ["evidence", "shift_verdict", "role"]] = None
    scan.profile["value"][0] = np.nan
    card = HeadCard(scan, head="L0.H0")
    assert card.info["slope"] is None and card.info["share_distance"] is None
    html = card.to_html()
    assert "—" in html and "nan" not in html.lower().replace("nanmean", "")
    assert "No distance profile" in html
    atlas_html = Atlas(scan).to_html()
    assert "nan" not in re.sub(r"<[^>]+>", "", atlas_html).lower()


# ------------------------------------------------------------------ card and linking
def test_selecting_a_head_in_the_atlas_updates_the_card():
    scan = synthetic_scan(3, 4, seed=7)
    sv = Survey(scan, findings=False, head="L0.H0")
    first = (sv.card.head, dict(sv.card.info), bytes(sv.card.map_codes))
    sv.atlas.selected = "L2.H3"
    assert sv.card.head == "L2.H3"
    row = scan.head(2, 3)
    assert sv.card.info["role"] == row["role"]
    assert sv.card.info["slope"] == pytest.approx(row["slope"])
    assert (sv.card.head, sv.card.info) != first[:2]
    want = scan.weight_map(sv.card.text, 2, 3)
    vmax = sv.card.map_meta["vmax"]
    got = sv.card.map_array().astype(float) / 254 * vmax
    assert np.allclose(got, np.minimum(want, vmax), atol=vmax / 254)
    # colour scale: the 99th percentile of positive weights (a causal map's first row, weight 1, would
    # otherwise darken everything else), and the card says the top was clipped
    assert vmax == pytest.approx(np.quantile(want[want > 0], 0.99), rel=1e-5)
    assert sv.card.map_meta["clipped"] is True and sv.card.map_meta["max"] == pytest.approx(1.0)
    # top keys are the keys with the highest mean weight, with their tokens
    col = want.mean(axis=0)
    assert [k["slot"] for k in sv.card.top_keys][:3] == list(np.argsort(-col, kind="stable")[:3])
    assert sv.card.top_keys[0]["token"] == scan.tokens[sv.card.text][sv.card.top_keys[0]["slot"]]


def test_card_downsamples_long_maps_and_zooms_into_a_window():
    scan = synthetic_scan(1, 2, seed=8, n_texts=1, text_length=600, hostile=False)
    card = HeadCard(scan, head="L0.H1")
    m = card.map_meta
    assert max(m["rows"], m["cols"]) <= 256 and m["step_q"] == 3 and m["T"] == 600
    w = scan.weight_map(0, 0, 1)
    block = w[:3, :3].mean()
    assert card.map_array()[0, 0] == round(min(block, m["vmax"]) / m["vmax"] * 254)
    assert len(card.row_labels) == m["rows"] and card.row_labels[0].startswith("#0\u20132 ")
    card.window = [100, 164, 80, 144]
    m = card.map_meta
    assert (m["rows"], m["cols"], m["step_q"], m["q0"], m["k0"]) == (64, 64, 1, 100, 80)
    assert card.row_labels[0] == "#100 " + show_token(scan.tokens[0][100])
    sub = w[100:164, 80:144]
    assert np.allclose(card.map_array() / 254 * m["vmax"], np.minimum(sub, m["vmax"]), atol=m["vmax"] / 254 + 1e-7)
    card.head = "L0.H0"                    # same text: the zoom stays so heads compare in place
    assert card.map_meta["q0"] == 100


def test_card_without_kept_map_says_so():
    scan = synthetic_scan(2, 2, seed=9, keep_maps=1)
    card = HeadCard(scan, head="L1.H1")
    assert card.texts == [] and card.map_meta == {} and card.text == -1
    assert "No weight map was kept" in card.to_html()
    card.head = "L0.H0"
    assert card.texts and card.map_meta["rows"] > 0


# ------------------------------------------------------------------ findings
findings_mod = pytest.importorskip("attnpos.findings")


def test_findings_panel_writes_through_the_store_and_marks_the_views(tmp_path):
    scan = synthetic_scan(3, 3, seed=10)
    path = tmp_path / "notes.json"
    sv = Survey(scan, findings=path, head="L1.H2")
    sv.panel.add("copies the previous token; shift test: stays", status="supported")
    # a message as the browser sends it: a note on the layer
    sv.panel._on_msg(sv.panel, {"action": "add", "scope": "layer", "body": "layer 1 mostly local", "status": "open"}, [])
    assert sv.panel.message == ""
    on_disk = {f.target: f for f in findings_mod.Findings(path).all()}
    assert set(on_disk) == {"L1.H2", "L1"}
    assert on_disk["L1.H2"].status == "supported"
    assert on_disk["L1.H2"].fingerprint == scan.model["fingerprint"]
    assert sv.atlas.marks["L1.H2"]["n"] == 1 and sv.atlas.marks["L1"]["n"] == 1
    assert [r["target"] for r in sv.card.findings] == ["L1.H2", "L1"]
    assert "apx-mark" in sv.atlas.to_html()
    # edit and remove, as the browser would
    fid = next(r["id"] for r in sv.panel.rows if r["target"] == "L1")
    sv.panel._on_msg(sv.panel, {"action": "edit", "id": fid, "body": "layer 1 is local", "status": "ruled-out"}, [])
    assert findings_mod.Findings(path).all()[-1].status in findings_mod.STATUSES
    assert {f.body for f in findings_mod.Findings(path).all()} == {"copies the previous token; shift test: stays",
                                                                   "layer 1 is local"}
    sv.panel._on_msg(sv.panel, {"action": "remove", "id": fid}, [])
    assert [f.target for f in findings_mod.Findings(path).all()] == ["L1.H2"]
    assert "L1" not in sv.atlas.marks
    # a bad status from the browser is reported in the panel, not raised into the kernel
    sv.panel._on_msg(sv.panel, {"action": "add", "scope": "head", "body": "x", "status": "certain"}, [])
    assert "status" in sv.panel.message
    # moving the selection points the panel at the new head
    sv.atlas.selected = "L0.H1"
    assert sv.panel.targets == {"model": "model", "head": "L0.H1", "layer": "L0"}


def test_findings_survive_a_restart_and_show_stale_ones(tmp_path):
    scan = synthetic_scan(2, 2, seed=11)
    path = tmp_path / "notes.json"
    store = findings_mod.Findings(path)
    store.add("L0.H1", "made on this checkpoint", fingerprint=scan.model["fingerprint"], texts_hash=scan.texts_hash)
    store.add("L1.H0", "made on an older checkpoint", fingerprint="0123abcd", texts_hash=scan.texts_hash)
    sv = Survey(scan, findings=str(path), head="L1.H0")          # a fresh kernel opens the same file
    rows = {r["target"]: r for r in sv.panel.rows}
    assert rows["L0.H1"]["stale"] is False and rows["L1.H0"]["stale"] is True
    assert sv.atlas.marks["L1.H0"]["stale"] == 1 and sv.atlas.marks["L0.H1"]["fresh"] == 1
    assert any(r["stale"] for r in sv.card.findings)
    html = sv.to_html()
    assert "apx-mark-stale" in html and ">stale<" in html


def test_two_panels_on_one_file_lose_no_note(tmp_path):
    scan = synthetic_scan(2, 2, seed=12)
    path = tmp_path / "notes.json"
    a = FindingsPanel(path, scan=scan, head="L0.H0")
    b = FindingsPanel(path, scan=scan, head="L1.H1")
    for k in range(3):
        a.add(f"a{k}")
        b.add(f"b{k}")
    a.refresh()
    assert sorted(r["body"] for r in a.rows) == ["a0", "a1", "a2", "b0", "b1", "b2"]


# ------------------------------------------------------------------ static renderings and escaping
def test_static_html_escapes_hostile_tokens_and_bodies(tmp_path):
    scan = synthetic_scan(3, 3, seed=13, hostile=True)
    assert HOSTILE in scan.tokens[0] and HOSTILE_IMG in scan.tokens[0]
    path = tmp_path / "notes.json"
    sv = Survey(scan, findings=path, head="L0.H0")
    sv.panel.add(f"body with {HOSTILE} and {HOSTILE_IMG} and \x1b[31m", status="open")
    for html in (sv.to_html(), sv.card.to_html(), sv.panel.to_html(), sv.atlas.to_html(), Curves(scan).to_html()):
        assert_no_injection(html)
    card = sv.card.to_html()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in card       # the hostile token is there, as text
    assert "&quot;&gt;&lt;img src=x onerror=alert(1)&gt;" in card
    assert "\\x1b[31m" in card                                   # control characters made visible
    assert "text-0&lt;b&gt;" in card                              # text names are user strings too
    table = sv.panel.to_html()
    assert "body with &lt;script&gt;" in table


def test_static_atlas_writes_role_labels_beside_colours():
    scan = synthetic_scan(4, 4, seed=14)
    html = static.atlas_html(scan)
    for role in set(scan.heads["role"]):
        assert role in html                                       # the legend spells it out
        assert f">{_common.role_shorts()[role]}</text>" in html      # and each cell writes it
    cells = [a for t, a in elements(html) if t == "g" and "apx-cell" in a.get("class", "")]
    assert len(cells) == len(scan.heads)
    assert CAUTION[:40] in html
    dense = static.atlas_html(synthetic_scan(2, 20, seed=1))
    assert ">Pv</text>" in dense or ">Co</text>" in dense          # dense grids write the two-letter code


def _png_size(data: bytes) -> tuple[int, int]:
    # PNG specification (W3C): the 8-byte signature, then the IHDR chunk with width and height as big-endian uint32
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")


def test_widget_bundle_carries_pictures_and_words_beside_the_widget():
    import base64

    scan = synthetic_scan(2, 2, seed=15)
    for w in (Atlas(scan), HeadCard(scan), Curves(scan)):
        data, _meta = w._repr_mimebundle_()
        assert "application/vnd.jupyter.widget-view+json" in data
        w_, h_ = _png_size(base64.b64decode(data["image/png"]))
        assert w_ >= 300 and h_ >= 200
        assert data["image/svg+xml"].lstrip().startswith(("<?xml", "<svg"))
        # the HTML an untrusted JupyterLab or nbconvert shows: the same picture inline, and the words
        assert '<img alt="' in data["text/html"] and "data:image/png;base64," + data["image/png"][:40] in data["text/html"]
        assert "Caution" in data["text/html"] and "Caution" in data["text/markdown"] and "Caution" in data["text/plain"]
        assert_no_injection(data["text/html"])
    data, _ = Atlas(scan)._repr_mimebundle_()
    for role, n in scan.heads["role"].value_counts().items():
        assert f"{n} {role}" in data["text/plain"]                # the summary counts the roles
    data, _ = Survey(scan, findings=False)._repr_mimebundle_()
    w_, h_ = _png_size(base64.b64decode(data["image/png"]))    # atlas, card and curves, one above the other
    assert h_ > 900
    assert "Head L0.H0" in data["text/plain"]


def test_an_empty_view_draws_no_empty_picture():
    scan = synthetic_scan(2, 2, seed=16, extra=False)
    data, _ = Curves(scan)._repr_mimebundle_()
    assert "image/png" not in data and "not measured" in data["text/plain"]
    with pytest.raises(AttnposError):
        Curves(scan).save("curves.png")


def test_views_save_figures_for_papers(tmp_path):
    scan = synthetic_scan(3, 4, seed=17)
    atlas = Atlas(scan)
    for suffix, magic in ((".png", b"\x89PNG"), (".svg", b"<?xml"), (".pdf", b"%PDF")):
        for name, view in (("atlas", atlas), ("card", HeadCard(scan, head="L1.H2")), ("curves", Curves(scan))):
            out = view.save(tmp_path / f"{name}{suffix}")
            assert out.read_bytes()[:len(magic)] == magic
    svg = (tmp_path / "atlas.svg").read_text()
    # every head's role is written in its mark (text stays text in the SVG), so the picture survives greyscale
    codes = [_common.role_shorts()[r] for r in scan.heads["role"]]
    assert sum(svg.count(f">{c}<") for c in set(codes)) >= len(codes)
    with pytest.raises(AttnposError, match=".png, .svg or .pdf"):
        atlas.save(tmp_path / "atlas.jpeg")


def test_the_atlas_filter_keeps_what_it_says():
    scan = synthetic_scan(6, 5, seed=18)
    atlas = Atlas(scan)
    t = scan.heads.reset_index(drop=True)
    atlas.filter(roles=["previous-token", "local"], layers=(1, 3))
    want = t["role"].isin(["previous-token", "local"]) & t["layer"].between(1, 3)
    assert atlas.kept().tolist() == want.tolist()
    atlas.filter(strength=0.8)
    strength = [t.loc[i, _rolespec(r).strength] if _rolespec(r) and _rolespec(r).strength else np.nan
                for i, r in enumerate(t["role"])]
    assert atlas.kept().tolist() == [not (v < 0.8) for v in strength]      # NaN (not measured) stays
    assert np.allclose(np.frombuffer(atlas.strength, "<f4"), np.asarray(strength, float), equal_nan=True)
    atlas.filter()
    assert atlas.kept().all()


def _rolespec(name):
    from attnpos.core import roles
    return roles.get(str(name))


def _line_of_scan(slope: float):
    """A synthetic scan whose head L0.H0 has a profile falling by ``slope`` per token (and that slope)."""
    scan = synthetic_scan(1, 2, seed=19, missing=0.0)
    d = np.asarray(scan.profile["distance"], float)
    scan.profile["value"][0] = -slope * np.minimum(d, 40)
    scan.profile["low"][0] = scan.profile["value"][0] - 0.1
    scan.profile["high"][0] = scan.profile["value"][0] + 0.1
    scan.heads.loc[0, "slope"] = slope
    return scan


@pytest.mark.parametrize("slope", [0.05, -0.05])
def test_the_slope_line_falls_where_the_profile_falls(slope):
    # the slope convention of attnpos.split: positive when scores fall with distance; the drawn line must agree
    scan = _line_of_scan(slope)
    card = HeadCard(scan, head="L0.H0")
    pts = np.array(card.info["slope_line"])                       # what the widget draws
    assert len(pts) > 2 and np.sign(pts[-1, 1] - pts[0, 1]) == -np.sign(slope)
    # the static SVG: x grows with δ, and SVG y grows downwards
    svg = static.profile_svg(_data.head_info(scan, "L0.H0"))
    line = re.search(r'class="apx-slope" points="([^"]+)"', svg).group(1).split()
    (x0, y0), (x1, y1) = [tuple(map(float, p.split(","))) for p in (line[0], line[-1])]
    assert x1 > x0 and np.sign(y1 - y0) == np.sign(slope)
    # the picture: matplotlib's line data
    from attnpos.views import figures
    fig = figures.card_figure(scan, "L0.H0")
    (drawn,) = [ln for ax in fig.axes for ln in ax.get_lines() if ln.get_gid() == "slope"]
    (prof,) = [ln for ax in fig.axes for ln in ax.get_lines() if ln.get_gid() == "profile"]
    ys, py = drawn.get_ydata(), prof.get_ydata()
    assert np.sign(ys[-1] - ys[0]) == -np.sign(slope) == np.sign(py[-1] - py[0])


def test_a_big_model_fits_the_overview_layout():
    for layers, heads in ((30, 9), (32, 32)):
        lay = _data.atlas_layout(heads, layers)
        width = lay["left"] + heads * (lay["cw"] + lay["gap"])
        height = lay["top"] + layers * (lay["ch"] + lay["gap"])
        assert width <= _data.GRID_MAX_WIDTH and height <= _data.GRID_MAX_HEIGHT
        assert min(lay["cw"], lay["ch"]) >= 12                     # the written role still fits


def test_curves_show_what_exists_and_say_not_measured_otherwise():
    scan = synthetic_scan(3, 2, seed=16, extra=True)
    c = Curves(scan)
    r2 = [e["r2"] for e in scan.attached["probe"].layers]
    assert np.allclose(c.column("probe", "r2"), r2, atol=1e-6)
    assert np.allclose(c.column("length", "loss"), scan.attached["length"].loss, atol=1e-5)
    assert c.series["length"]["training_length"] == 64
    html = c.to_html()
    assert "training length 64" in html and "control (shuffled labels)" in html
    bare = Curves(synthetic_scan(3, 2, seed=16, extra=False))
    assert bare.series == {"probe": None, "length": None, "entropy": None}
    assert "Probe: not measured" in bare.to_html() and "Length: not measured" in bare.to_html()


def test_nbconvert_html_of_an_executed_notebook_contains_the_static_atlas(tmp_path):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    nbconvert = pytest.importorskip("nbconvert")
    nb = nbformat.v4.new_notebook()
    nb.cells = [nbformat.v4.new_code_cell(
        "from attnpos.views import Atlas\nfrom attnpos.views.synthetic import synthetic_scan\n"
        "Atlas(synthetic_scan(3, 3, seed=2))")]
    # JupyterLab saves notebooks without widget state unless asked to; nbconvert then falls back to text/html
    nbclient.NotebookClient(nb, timeout=120, kernel_name="python3", store_widget_state=False,
                            resources={"metadata": {"path": str(tmp_path)}}).execute()
    out = nb.cells[0].outputs[0]["data"]
    assert "application/vnd.jupyter.widget-view+json" in out and "text/html" in out
    html, _ = nbconvert.HTMLExporter().from_notebook_node(nb)
    assert "Atlas — role of every head" in html and '<img alt="Atlas' in html
    assert "data:image/png;base64," + out["image/png"][:40] in html
    # snapshot(): a plain HTML output that even a kernel-less JupyterLab shows after reopening
    nb.cells = [nbformat.v4.new_code_cell(
        "from attnpos.views import Atlas\nfrom attnpos.views.synthetic import synthetic_scan\n"
        "Atlas(synthetic_scan(2, 2, seed=2)).snapshot()")]
    nbclient.NotebookClient(nb, timeout=120, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}}).execute()
    data = nb.cells[0].outputs[0]["data"]
    assert "application/vnd.jupyter.widget-view+json" not in data and "apx-atlas" in data["text/html"]


# ------------------------------------------------------------------ small pieces
def test_colour_ramp_is_monotone_in_perceived_lightness():
    # OKLab lightness (Ottosson 2020, "A perceptual color space for image processing") must rise along a
    # sequential map, from the dark to the bright end. The ramp's end stops are viridis control points
    # (van der Walt & Smith 2015, matplotlib's default colormap; the hex values were written from memory).
    lab = _common.srgb_to_oklab(_common.RAMP / 255.0)
    # 8-bit rounding may tie or dip neighbours by a hair; over 8 steps lightness must rise strictly
    assert np.all(np.diff(lab[:, 0]) > -1e-3)
    assert np.all(np.diff(lab[::8, 0]) > 0)
    assert tuple(_common.RAMP[0]) == _common._hex_rgb(_common._RAMP_STOPS[0])
    assert tuple(_common.RAMP[-1]) == _common._hex_rgb(_common._RAMP_STOPS[-1])


def test_role_palette_keeps_roles_apart_and_labels_readable():
    # the role palette derives from Okabe & Ito 2008 ("Color Universal Design"), a colour-blind-safe set (common
    # practice); distinctness is measured in OKLab (Ottosson 2020). The 0.05 floor is our own judgement.
    colours, codes = _common.role_colours(), _common.role_codes()
    cols = [np.array(_common._hex_rgb(colours[r])) / 255 for r in _common.roles_now()]
    lab = _common.srgb_to_oklab(np.array(cols))
    dist = [np.linalg.norm(lab[i] - lab[j]) for i in range(len(lab)) for j in range(i)]
    assert min(dist) > 0.05
    assert len({codes[r] for r in _common.roles_now()}) == len(_common.roles_now())


def test_keys_round_trip_with_the_findings_target_form():
    for stack, layer, head in (("main", 3, 2), ("decoder", 1, 0)):
        key = head_key(stack, layer, head)
        assert parse_key(key) == (stack, layer, head)
    assert head_key("main", 3, 2) == "L3.H2" and head_key("decoder", 1, 0) == "decoder:L1.H0"
    with pytest.raises(AttnposError):       # the package promises AttnposError
        parse_key("L3.H2<script>")


@pytest.mark.parametrize("token", HOSTILE_TOKENS)
def test_show_token_and_escape_never_pass_markup_or_control_characters(token):
    shown = _common.esc(token)
    assert "<" not in shown and ">" not in shown and '"' not in shown
    assert not any(ord(ch) < 0x20 or 0x202A <= ord(ch) <= 0x202E for ch in shown)
    assert _common.esc(None) == "—"


def test_map_view_block_mean_matches_numpy():
    # reference: numpy's own mean over each block (a general-purpose library as the reference implementation)
    w = np.random.default_rng(0).random((10, 7)).astype(np.float32)
    mv = _common.map_view(w, max_side=4)
    assert (mv["step_q"], mv["step_k"], mv["rows"], mv["cols"]) == (3, 2, 4, 4)
    def code(block):
        return round(min(block.mean(), mv["vmax"]) / mv["vmax"] * 254)
    assert mv["q"][3, 3] == code(w[9:10, 6:7]) and mv["q"][1, 2] == code(w[3:6, 4:6])


def test_png_is_a_valid_image():
    import struct
    import zlib
    rgb = _common.colourise(np.array([[0, 127], [254, 255]], dtype=np.uint8))
    png = _common.png_bytes(rgb)
    # W3C PNG specification (2nd ed.): §5.2 the 8-byte signature, §11.2.2 IHDR width/height as big-endian
    # uint32 after the chunk length and type; IDAT holds a zlib stream (RFC 1950), read with Python's zlib
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    w, h = struct.unpack(">II", png[16:24])
    assert (w, h) == (2, 2)
    idat = png[png.index(b"IDAT") + 4:png.index(b"IEND") - 8]
    raw = zlib.decompress(idat)
    assert raw[1:4] == bytes(_common.RAMP[0]) and raw[-3:] == bytes(_common.MISSING_RGB)


def test_notable_heads_pick_the_strongest_per_role():
    scan = synthetic_scan(4, 4, seed=17)
    keys = _data.notable_heads(scan, per_role=1)
    t = scan.heads
    prev = t[t["role"] == "previous-token"]
    if len(prev):
        best = prev.loc[pd.to_numeric(prev["mass_previous"]).fillna(-1).idxmax()]
        assert head_key(best["stack"], best["layer"], best["head"]) in keys
    assert len(keys) == len(set(keys)) == len(set(t["role"]))


def test_a_folder_of_figures_for_a_paper(tmp_path):
    from attnpos.views import figures

    scan = synthetic_scan(3, 3, seed=20)
    paths = figures.write_figures(scan, tmp_path / "figs")
    names = {p.name for p in paths}
    assert {"atlas.png", "atlas.svg", "atlas.pdf", "curves.pdf"} <= names
    cards = {n for n in names if n.startswith("card-") and n.endswith(".png")}
    assert len(cards) == len(_data.notable_heads(scan))
    assert all(p.stat().st_size > 1000 for p in paths)


def test_scan_refuses_a_figures_path_that_is_a_file(tmp_path, capsys):
    from attnpos.cli import main as cli_main

    f = tmp_path / "not-a-folder"
    f.write_text("x")
    assert cli_main(["scan", "ref:rope", "--figures", str(f)]) == 2
    assert "--figures takes a folder" in capsys.readouterr().err


def test_every_part_of_the_split_is_drawn_on_the_card():
    # the card's share bars (static SVG, matplotlib picture, summary) follow the core's list of split parts,
    # including the position-pair part, instead of a list of their own
    from attnpos.core.columns import PART_NAMES
    from attnpos.views import static
    from attnpos.views.common import part_colours

    assert "pair" in PART_NAMES and list(part_colours()) == list(PART_NAMES)   # card.js reads the parts from it
    info = {f"share_{p}": 0.2 for p in PART_NAMES}
    svg = static.shares_svg(info)
    for p in PART_NAMES:
        assert f">{p}</text>" in svg
    assert f'height="{20 * len(PART_NAMES) + 16}"' in svg
