"""Static views: the kept JSON of plain property values and the records a document
lists for its BokehJS bundle.

The whole pages are compared with bokeh's own in ``test_views.py``; here each cached
encoding is checked against the uncached one (bokeh's property preparation and
serialiser) and against bokeh's serialisation of the same models.
"""

from __future__ import annotations

import json

import pytest
from bokeh.document import Document
from test_views import make_utterance

from peekalign.analysis import analyze
from peekalign.views import _static as st
from peekalign.views import utterance_view
from peekalign.views._document import to_document
from peekalign.views._serialize import _PlainListSerializer


@pytest.fixture
def fresh_cache(monkeypatch):
    monkeypatch.setattr(st, "_ENCODED", {})
    return st._ENCODED


def _cases(rng, tmp_path):
    """(analysis, view options) of several kinds of view: plain, WebGL with dense log
    images, TeX-like transcript text without attention or controls."""
    a = analyze(make_utterance(rng, tmp_path), lookahead=2)
    yield a, {}
    yield a, {"compact": False, "scale": "log", "output_backend": "webgl"}
    u = make_utterance(rng, None, ref="call $$x$$ depot", attention=False, uid="tram$$")
    yield analyze(u, lookahead=0), {"controls": False}


def _views(rng, tmp_path):
    for a, kw in _cases(rng, tmp_path):
        yield utterance_view(a, static=True, **kw)


def _set_values(doc):
    """(record, property, value) of every serialised property of every record."""
    for m in st._models_of(doc):
        for key, value in m._props.items():
            if key in m._info.serialized and not (key in m._lazy and not value):
                yield m, key, value


def test_kept_encodings_equal_fresh_ones_on_every_record(rng, tmp_path, fresh_cache):
    """Every property of every record of several kinds of view: the JSON served from the
    cache is the JSON bokeh's preparation and serialiser give (reference: bokeh's
    Property.prepare_value and Serializer, through ``_encode_fresh``)."""
    served = 0
    for view in _views(rng, tmp_path):
        doc = to_document(view, title="t")
        first = json.dumps(st.canonical_ids(st.document_json(doc)))
        assert fresh_cache, "plain values were kept"
        # now mostly served from the cache (the config record is new each time: ids)
        again = json.dumps(st.canonical_ids(st.document_json(doc)))
        assert again == first
        # one serialiser each: both meet the records in the same order
        s1, s2 = _PlainListSerializer(deferred=False), _PlainListSerializer(deferred=False)
        for m, key, value in _set_values(doc):
            if type(value) in st._MEMO_TYPES:
                served += (m._info, key, type(value), value) in fresh_cache
            elif type(value) is list and not value:
                served += (m._info, key, list, ()) in fresh_cache
            got = st._encode_value(m, key, value, s1)
            want = st._encode_fresh(m, key, value, s2)
            assert json.dumps(got) == json.dumps(want), (m, key, value)
    assert served > 100  # the check reached the cache, not only fresh encodings


def test_served_json_is_a_copy(fresh_cache):
    """Two records sharing a kept value get two JSON objects: changing one page's
    document changes no other (common practice, no source)."""
    from bokeh.models import Quad

    s = _PlainListSerializer(deferred=False)
    a, b = st.StaticModel(Quad, line_color="red"), st.StaticModel(Quad, line_color="red")
    ja = st._encode_value(a, "line_color", "red", s)
    jb = st._encode_value(b, "line_color", "red", s)
    assert ja == {"type": "value", "value": "red"}  # a glyph's spec holds a value
    assert jb == ja and jb is not ja
    ja["value"] = "blue"
    assert st._encode_value(b, "line_color", "red", s) == {"type": "value", "value": "red"}


def _bokeh_and_static(cls, **props):
    """Attributes of one model serialised by bokeh, and of the record with the same
    properties by the static path (reference: bokeh's Document.to_json)."""
    live = cls(**props)
    d = Document()
    d.add_root(live)
    (ref,) = d.to_json(deferred=False)["roots"]
    doc = st.StaticDocument()
    doc.add_root(st.StaticModel(cls, **props))
    (ours,) = st.document_json(doc)["roots"]
    return ref.get("attributes", {}), ours.get("attributes", {})


def test_values_equal_in_python_are_kept_apart(fresh_cache):
    """1, 1.0 and True, 0.0 and -0.0 are equal keys in a dict but write different JSON;
    each encodes as bokeh encodes it (reference: bokeh's Document.to_json)."""
    from bokeh.models import Range1d, Span

    for start in (1.0, 1, 2.5, 2.5):
        ref, ours = _bokeh_and_static(Range1d, start=start, end=10)
        assert json.dumps(ours) == json.dumps(ref), start
    for loc in (0.5, 0.0, -0.0, 0.0, float("nan"), float("inf")):
        ref, ours = _bokeh_and_static(Span, location=loc)
        assert json.dumps(ours) == json.dumps(ref), loc


def test_a_units_spec_is_encoded_per_record(fresh_cache):
    """An angle's JSON carries the record's own units: the same value of two records
    with different units writes two different JSONs, each bokeh's (reference: bokeh's
    Document.to_json)."""
    from bokeh.models import Wedge

    got = set()
    for units in ("deg", "rad", "deg"):
        ref, ours = _bokeh_and_static(
            Wedge, x=1, y=1, radius=1, start_angle=0.5, end_angle=1.5, start_angle_units=units
        )
        assert json.dumps(ours) == json.dumps(ref), units
        got.add(json.dumps(ours["start_angle"]))
    assert len(got) == 2


def test_a_mutated_list_is_not_served_stale(fresh_cache):
    """A list kept empty and filled in place afterwards, and a string changed after its
    first encoding, write their new values (reference: hand-worked)."""
    from bokeh.models import Div, FixedTicker

    s = _PlainListSerializer(deferred=False)
    t = st.StaticModel(FixedTicker, ticks=[])
    assert st._encode_value(t, "ticks", t.ticks, s) == []
    t.ticks.extend([1.0, 2.5])
    assert st._encode_value(t, "ticks", t.ticks, s) == [1.0, 2.5]
    d = st.StaticModel(Div, text="first")
    assert st._encode_value(d, "text", d.text, s) == "first"
    d.text = "second"
    assert st._encode_value(d, "text", d.text, s) == "second"


def test_the_cache_stays_bounded(monkeypatch, fresh_cache):
    """Past its size the cache starts over (common practice, no source)."""
    from bokeh.models import Div

    monkeypatch.setattr(st, "_ENCODED_MAX", 10)
    s = _PlainListSerializer(deferred=False)
    for k in range(35):
        m = st.StaticModel(Div, text=f"word {k}")
        assert st._encode_value(m, "text", m.text, s) == f"word {k}"
        assert len(fresh_cache) <= 10


def test_the_document_lists_the_records_the_walk_finds(rng, tmp_path):
    """The records ``document_json`` lists while writing are the ones a walk from the
    roots reaches, each once (reference: brute force, the walk over every property), and
    ask for the BokehJS files bokeh's bundle asks for with its own models of the view
    (reference: bokeh.embed.bundle's _use_widgets, _use_tables, _use_gl, _use_mathjax)."""
    from bokeh.embed import bundle as bb
    from bokeh.models import CustomJS

    kinds = set()
    for a, kw in _cases(rng, tmp_path):
        doc = to_document(utterance_view(a, static=True, **kw), title="t")
        doc.js_on_event("document_ready", st.StaticModel(CustomJS, code="1"))
        records: list = []
        st.document_json(doc, records)
        walked = st._models_of(doc)
        assert len(records) == len({id(m) for m in records})
        assert {id(m) for m in records} == {id(m) for m in walked}
        live = set(to_document(utterance_view(a, **kw), title="t").models)
        want = (bb._use_widgets(live), bb._use_tables(live), bb._use_gl(live))
        want += (bb._use_mathjax(live),)
        assert st._bundle_flags(records) == want, kw
        kinds.add(want)
    assert len(kinds) >= 3  # the cases differ in what they need


def test_bare_records_get_their_own_models_and_lists():
    """What bokeh makes for a bare instance (a data source's selection, a renderer's
    view, a plot's lists) is each record's own, as on bokeh's models (reference: bokeh's
    constructors)."""
    from bokeh.models import ColumnDataSource, GlyphRenderer, Selection

    for cls, key in ((ColumnDataSource, "selected"), (GlyphRenderer, "view")):
        a, b = cls(), cls()
        assert getattr(a, key) is not getattr(b, key)  # bokeh: one each
        sa, sb = st.StaticModel(cls), st.StaticModel(cls)
        assert isinstance(getattr(sa, key), st.StaticModel)
        assert (
            getattr(sa, key) is not getattr(sb, key) and getattr(sa, key).id != getattr(sb, key).id
        )
    # a list bokeh materialises (a selection's indices) is each record's own
    a, b = Selection(), Selection()
    a.indices.append(3)
    sa, sb = st.StaticModel(Selection), st.StaticModel(Selection)
    sa.indices.append(3)
    assert sb.indices == b.indices == [] and sa.indices == a.indices == [3]


def test_a_bundle_is_made_once_per_need_and_resources(rng, tmp_path, monkeypatch):
    """The script list of a page is the one bokeh makes for its models, whether made or
    kept; other resources or another need make another (reference: bokeh.embed.bundle's
    bundle_for_objs_and_resources on bokeh's own models of the view)."""
    from bokeh.embed.bundle import bundle_for_objs_and_resources
    from bokeh.resources import Resources

    monkeypatch.setattr(st, "_BUNDLES", {})
    here, there = Resources(mode="server", root_url="../"), Resources(mode="server", root_url="/")
    seen = []
    for a, kw in _cases(rng, tmp_path):
        live = to_document(utterance_view(a, **kw), title="t")
        doc = to_document(utterance_view(a, static=True, **kw), title="t")
        for res in (here, there, here):
            records: list = []
            st.document_json(doc, records)
            got = st.resources_bundle(doc, res, records)
            want = bundle_for_objs_and_resources([live], res)
            assert list(got) == list(want), (kw, res.root_url)
            seen.append(got)
    assert 2 <= len(st._BUNDLES) < len(seen)  # kept and served again
