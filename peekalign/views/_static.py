"""Static views: the same builders, writing the document JSON without bokeh's models.

A bokeh model costs about a millisecond to build (every property's default is made,
validated and themed) and a view holds ~400 of them, most of what a page takes. A page
with no kernel behind it never needs them: :class:`StaticModel` records what the view
builders set on it, and :func:`document_json` writes the JSON that bokeh writes for the
same models (``Document.to_json``). What bokeh adds on its own is taken from bokeh
once per process: the models a bare instance of a class materialises (a data source's
``selected``, a renderer's ``view``, ...) and the axes, grids, tools and toolbar that
``figure()`` builds for a set of tool options. Values go through bokeh's own property
preparation and serialiser. ``tests/test_views.py`` checks the result equal to bokeh's
serialisation of the same view, model for model, on every kind of view.

The builders pick the kind of model through :func:`models` (bokeh's, or these in
``with static():``), so there is one builder for both.
"""

from __future__ import annotations

import contextlib
import contextvars
import functools
import itertools
from collections.abc import Iterator
from typing import Any

from bokeh.core.property.bases import Property
from bokeh.core.property.descriptors import DataSpecPropertyDescriptor
from bokeh.core.serialization import Serializable, Serializer
from bokeh.model import Model

__all__ = [
    "StaticModel",
    "StaticDocument",
    "static",
    "is_static",
    "is_a",
    "models",
    "document_json",
    "canonical_ids",
]

_STATIC = contextvars.ContextVar("peekalign_static_views", default=False)
_NOTHING = object()


@contextlib.contextmanager
def static(on: bool = True) -> Iterator[None]:
    """Inside the block, the view builders make :class:`StaticModel` records."""
    token = _STATIC.set(on)
    try:
        yield
    finally:
        _STATIC.reset(token)


def is_static() -> bool:
    return _STATIC.get()


class StaticUnsupported(RuntimeError):
    """A value bokeh computes or nests that static records do not mirror.

    Raised for a property default bokeh computes at run time, or a model nested in a
    wrapper bokeh's serialisation did not use when the records were written; the tests
    comparing every kind of view with bokeh's own serialisation catch it on a new bokeh
    release. The way out for a user is ``static=False`` (bokeh's own models).
    """


# -- what bokeh knows about a class --------------------------------------------------


class _ClassInfo:
    """Property names in bokeh's serialisation order, and their descriptors."""

    def __init__(self, cls: type[Model]) -> None:
        self.cls = cls
        self.order = list(cls.properties(_with_props=True))
        self.names = frozenset(self.order)
        self.descriptors = {k: cls.lookup(k) for k in self.order}
        self.serialized = frozenset(k for k in self.order if self.descriptors[k].serialized)
        #: a property's place in the serialisation order
        self.index = {k: i for i, k in enumerate(self.order)}
        self.name = cls.__qualified_model__
        self._defaults: dict = {}
        self._memo: dict[str, bool] = {}
        self._bundle: tuple | None = None

    def default(self, name: str):
        d = self._defaults.get(name, _NOTHING)
        if d is _NOTHING:
            d = self._defaults[name] = self.descriptors[name].class_default(self.cls, no_eval=True)
        if callable(d) or isinstance(d, Model):
            raise StaticUnsupported(
                f"static views: the default of {self.name}.{name} is computed by bokeh; "
                "set it explicitly, or draw with static=False (bokeh's own models)"
            )
        if isinstance(d, (list, dict)):
            return type(d)()
        return d

    def memoisable(self, name: str) -> bool:
        """Whether a plain value of ``name`` always encodes to the same JSON: the
        property's preparation and serialiser read nothing but the value (not so for a
        units spec, whose JSON takes the units from another property of the record)."""
        ok = self._memo.get(name)
        if ok is None:
            prop = self.descriptors[name].property
            ok = self._memo[name] = not _is_units_spec(prop)
        return ok

    def bundle_kinds(self) -> tuple[bool, bool, bool, bool, bool]:
        """What a record of this class can make a page's BokehJS bundle need: a
        widget, a table, a plot (WebGL when its backend says so), math text, TeX in
        its text (``bokeh.embed.bundle``'s checks, by class)."""
        if self._bundle is None:
            from bokeh.models import (
                Axis,
                Div,
                Paragraph,
                Plot,
                TableWidget,
                TextAnnotation,
                Widget,
            )
            from bokeh.models.glyphs import MathTextGlyph
            from bokeh.models.text import MathText
            from bokeh.models.widgets.sliders import AbstractSlider

            c = self.cls
            self._bundle = (
                issubclass(c, Widget),
                issubclass(c, TableWidget),
                issubclass(c, Plot),
                issubclass(c, (MathTextGlyph, MathText)),
                issubclass(c, (TextAnnotation, AbstractSlider, Axis, Div, Paragraph)),
            )
        return self._bundle


@functools.cache
def _info(cls: type[Model]) -> _ClassInfo:
    return _ClassInfo(cls)


def _selected_attributes(model: Model, serializer: Serializer) -> dict:
    """The attributes bokeh serialises for ``model`` (``views._serialize``'s rule)."""
    from ._serialize import _model_rep

    return _model_rep(model, serializer).get("attributes", {})


@functools.cache
def _bare(cls: type[Model]) -> dict:
    """JSON attributes of a bare instance: the defaults bokeh materialises itself."""
    return _selected_attributes(cls(), Serializer(deferred=False))


class _Raw:
    """A value already in bokeh's JSON form (taken from a serialised template)."""

    __slots__ = ("json",)

    def __init__(self, json) -> None:
        self.json = json


def _decode(value, ids: dict):
    """Template JSON back into values: objects become fresh :class:`StaticModel` s."""
    if isinstance(value, list):
        return [_decode(v, ids) for v in value]
    if not isinstance(value, dict):
        return value
    if value.get("type") == "object":
        cls = Model.model_class_reverse_map[value["name"]]
        m = _new(cls)
        ids[value["id"]] = m
        for k, v in value.get("attributes", {}).items():
            m._props[k] = _decode(v, ids)
        return m
    if len(value) == 1 and "id" in value:
        return ids[value["id"]]
    if _holds_object(value):
        raise StaticUnsupported(
            f"static views: this bokeh version nests a model inside a {value.get('type')!r} "
            "value, which static records do not mirror; draw with static=False (bokeh's "
            "own models) or use a bokeh release the tests passed with"
        )
    return _Raw(value)


def _holds_object(value) -> bool:
    if isinstance(value, dict):
        return value.get("type") == "object" or any(_holds_object(v) for v in value.values())
    if isinstance(value, list):
        return any(_holds_object(v) for v in value)
    return False


# -- the records ---------------------------------------------------------------------


class StaticModel(Serializable):
    """One model of a static view: the properties set on it, serialised as bokeh does.

    Reading a property not set gives bokeh's default; setting an unknown name is an
    error, as on a bokeh model.
    """

    __slots__ = ("_info", "_props", "_lazy", "id")

    def __init__(self, cls: type[Model], **props: Any) -> None:
        _init(self, cls)
        for k, v in _bare_props(cls).items():
            self._props[k] = v
        for k, v in props.items():
            setattr(self, k, v)
        post = _POST_INIT.get(self._info.name)
        if post is not None:
            post(self)

    # attribute access ---------------------------------------------------------------
    def __getattr__(self, name: str):
        if name.startswith("__"):
            raise AttributeError(name)
        props = object.__getattribute__(self, "_props")
        if name in props:
            return props[name]
        info = object.__getattribute__(self, "_info")
        if name not in info.names:
            raise AttributeError(f"{info.name} has no property {name!r}")
        value = info.default(name)
        if isinstance(value, (list, dict)):
            # bokeh keeps a read container and serialises it once it is changed
            props[name] = value
            self._lazy.add(name)
        return value

    def __setattr__(self, name: str, value) -> None:
        if name in StaticModel.__slots__:
            object.__setattr__(self, name, value)
            return
        info = self._info
        if name not in info.names:
            raise AttributeError(f"{info.name} has no property {name!r}")
        props = self._props
        if name not in props and (value is None or type(value) in _SIMPLE_TYPES):
            # bokeh stores nothing when a property is set to the value it has
            try:
                old = info.default(name)
            except StaticUnsupported:  # a computed default: bokeh stores the value
                old = _NOTHING
            # Property.matches of two plain values is their equality
            if (old is None or type(old) in _SIMPLE_TYPES) and value == old:
                return
        props[name] = value
        self._lazy.discard(name)

    def update(self, **kw) -> None:
        for k, v in kw.items():
            setattr(self, k, v)

    @property
    def ref(self) -> dict:
        return {"id": self.id}

    def is_a(self, base) -> bool:
        return issubclass(self._info.cls, base)

    def __repr__(self) -> str:
        return f"{self._info.name}(id={self.id!r}, static)"

    # callbacks, as Model.js_on_change / js_on_event --------------------------------
    def js_on_change(self, event: str, *callbacks) -> None:
        if not callbacks:
            raise ValueError("js_on_change takes an event name and one or more callbacks")
        if event in self._info.names:
            event = f"change:{event}"
        cbs = dict(self.js_property_callbacks)
        lst = list(cbs.get(event, []))
        lst += [cb for cb in callbacks if cb not in lst]
        cbs[event] = lst
        self.js_property_callbacks = cbs

    def js_on_event(self, event: str, *callbacks) -> None:
        from bokeh.events import Event

        name = Event.cls_for(event).event_name
        cbs = dict(self.js_event_callbacks)
        lst = list(cbs.get(name, []))
        lst += [cb for cb in callbacks if cb not in lst]
        cbs[name] = lst
        self.js_event_callbacks = cbs

    # serialisation -------------------------------------------------------------------
    def to_serializable(self, serializer: Serializer) -> dict:
        serializer.add_ref(self, self.ref)
        records = getattr(serializer, "records", None)
        if records is not None:
            records.append(self)
        info, props, lazy = self._info, self._props, self._lazy
        serialized = info.serialized
        # the few properties set, in bokeh's order (not a walk over all ~60 of a class)
        keys = [k for k in props if k in serialized and not (k in lazy and not props[k])]
        keys.sort(key=info.index.__getitem__)
        attributes = {}
        for key in keys:
            attributes[key] = _encode_value(self, key, props[key], serializer)
        rep = {"type": "object", "name": info.name, "id": self.id}
        if attributes:
            rep["attributes"] = attributes
        return rep


_SIMPLE_TYPES = frozenset({bool, int, float, str})


def _legend_item_label(m: StaticModel) -> None:
    # LegendItem.__init__: a plain string label is a value, not a column name
    from bokeh.core.properties import value

    label = m._props.get("label")
    if isinstance(label, str):
        m.label = value(label)


#: what a bokeh class's __init__ does after setting the keywords
_POST_INIT = {"LegendItem": _legend_item_label}


#: record ids: unique in the process like bokeh's simple ids ("p1", "p2", ...), with a
#: prefix of their own so they never meet one of bokeh's; bokeh's make_id reads its
#: settings on every call, a few microseconds times the ~500 records of a view
_RECORD_IDS = itertools.count(1)


def _init(m: StaticModel, cls: type[Model]) -> None:
    object.__setattr__(m, "_info", _info(cls))
    object.__setattr__(m, "_props", {})
    object.__setattr__(m, "_lazy", set())
    object.__setattr__(m, "id", f"s{next(_RECORD_IDS)}")


def _new(cls: type[Model]) -> StaticModel:
    m = StaticPlot.__new__(StaticPlot) if _is_plot(cls) else StaticModel.__new__(StaticModel)
    _init(m, cls)
    return m


def _bare_props(cls: type[Model]) -> dict:
    fixed, nested = _bare_recipe(cls)
    if not nested:
        return fixed
    ids: dict = {}
    out = dict(fixed)
    for k, v in nested:
        out[k] = _decode(v, ids)
    return out


@functools.cache
def _bare_recipe(cls: type[Model]) -> tuple[dict, tuple]:
    """A bare instance's attributes, split into values every record can share (plain
    values and :class:`_Raw` JSON, never changed in place) and the ones each record
    decodes afresh (lists, and the models bokeh makes for it)."""
    fixed, nested = {}, []
    for k, v in _bare(cls).items():
        if isinstance(v, list) or (isinstance(v, dict) and _holds_ref(v)):
            nested.append((k, v))
        else:
            fixed[k] = _decode(v, {})
    return fixed, tuple(nested)


def _holds_ref(value: dict) -> bool:
    """Whether ``_decode`` turns this JSON dict into a record (or a ref to one)."""
    return value.get("type") == "object" or (len(value) == 1 and "id" in value)


#: encoded plain values by (class info, property, type, value); cleared when full
_ENCODED: dict = {}
_ENCODED_MAX = 20_000


def _encode_value(model: StaticModel, key: str, value, serializer: Serializer):
    """A property's JSON. Plain values (strings, numbers, booleans, None, an empty
    list) always encode the same for a class and property: their JSON is kept and
    served again (a copy), sparing bokeh's preparation and serialiser, most of a page's
    document time. Containers with items, arrays and records are encoded every time."""
    t = type(value)
    if t in _MEMO_TYPES and (t is not float or (value != 0.0 and value - value == 0.0)):
        # floats: neither zero (-0.0 == 0.0 but writes "-0.0") nor inf / nan
        memo = (model._info, key, t, value)
    elif t is list and not value:
        memo = (model._info, key, t, ())
    else:
        return _encode_fresh(model, key, value, serializer)
    got = _ENCODED.get(memo, _NOTHING)
    if got is _NOTHING:
        got = _encode_fresh(model, key, value, serializer)
        if not model._info.memoisable(key):
            return got
        if len(_ENCODED) >= _ENCODED_MAX:
            _ENCODED.clear()
        _ENCODED[memo] = got
    return _json_copy(got)


_MEMO_TYPES = frozenset({str, int, float, bool, type(None)})


def _json_copy(v):
    """A fresh copy of a JSON value's containers (a page's document is its own)."""
    if type(v) is dict:
        return {k: _json_copy(x) for k, x in v.items()}
    if type(v) is list:
        return [_json_copy(x) for x in v]
    return v


def _is_units_spec(prop) -> bool:
    from bokeh.core.property.dataspec import DataSpec

    return (
        isinstance(prop, DataSpec) and type(prop).to_serializable is not DataSpec.to_serializable
    )


def _encode_fresh(model: StaticModel, key: str, value, serializer: Serializer):
    """``value`` prepared and serialised as bokeh does for ``model``'s property."""
    if isinstance(value, _Raw):
        return value.json
    descriptor = model._info.descriptors[key]
    prop = descriptor.property
    if not _holds_static(value):
        # bokeh's checks of what the builders set run in the tests (the equality with
        # bokeh's own models); a page need not pay for them again
        was, Property._should_validate = Property._should_validate, False
        try:
            value = prop.prepare_value(model._info.cls, key, value)
        finally:
            Property._should_validate = was
    if isinstance(descriptor, DataSpecPropertyDescriptor):
        value = _spec_value(prop, model, key, value)
    return serializer.encode(value)


def _spec_value(prop, model: StaticModel, key: str, value):
    """``DataSpec.to_serializable``: a value or a field. Bokeh builds the type it checks
    against (the spec's value type, strings left out) on every call; it is built here
    once per property."""
    from bokeh.core.property.dataspec import DataSpec

    if type(prop).to_serializable is not DataSpec.to_serializable:
        return prop.to_serializable(model, key, value)  # units specs add their units
    from bokeh.core.property.vectorization import Field, Value

    try:
        _value_type(prop).validate(value, False)
        return Value(value)
    except ValueError:
        pass
    return Field(value) if isinstance(value, str) else value


_VALUE_TYPES: dict[int, tuple] = {}


def _value_type(prop):
    from bokeh.core.properties import Nothing, String

    got = _VALUE_TYPES.get(id(prop))
    if got is None or got[0] is not prop:
        got = _VALUE_TYPES[id(prop)] = (prop, prop.value_type.replace(String, Nothing()))
    return got[1]


def _holds_static(value) -> bool:
    if isinstance(value, (StaticModel, _Raw)):
        return True
    if isinstance(value, (list, tuple)):
        if set(map(type, value)) <= _SCALAR_TYPES:  # labels, texts: nothing to walk
            return False
        return any(_holds_static(v) for v in value)
    if isinstance(value, dict):
        return any(_holds_static(v) for v in value.values())
    return False


_SCALAR_TYPES = _SIMPLE_TYPES | {type(None)}


def _is_plot(cls) -> bool:
    from bokeh.models import Plot

    return issubclass(cls, Plot)


class _Splat(list):
    """A list that sets an attribute on every item (bokeh's splattable lists)."""

    def __setattr__(self, name, value) -> None:
        for item in self:
            setattr(item, name, value)

    def __getattr__(self, name):
        if len(self) == 1:
            return getattr(self[0], name)
        raise AttributeError(name)


class StaticPlot(StaticModel):
    """A plot's record with the figure methods the view builders use."""

    __slots__ = ()

    def _of(self, sides, base):
        return _Splat(o for s in sides for o in getattr(self, s) if o.is_a(base))

    @property
    def xaxis(self):
        from bokeh.models import Axis

        return self._of(("above", "below"), Axis)

    @property
    def yaxis(self):
        from bokeh.models import Axis

        return self._of(("left", "right"), Axis)

    @property
    def axis(self):
        return _Splat(self.xaxis + self.yaxis)

    def _grid(self, dim: int):
        from bokeh.models import Grid

        return _Splat(g for g in self._of(("center",), Grid) if g.dimension == dim)

    @property
    def xgrid(self):
        return self._grid(0)

    @property
    def ygrid(self):
        return self._grid(1)

    @property
    def grid(self):
        return _Splat(self.xgrid + self.ygrid)

    @property
    def tools(self):
        return self.toolbar.tools

    def add_layout(self, obj, place: str = "center") -> None:
        for side in ("left", "right", "above", "below", "center"):
            panel = getattr(self, side)
            while obj in panel:
                panel.remove(obj)
        lst = getattr(self, place)
        lst.append(obj)
        self._lazy.discard(place)

    def add_tools(self, *tools) -> None:
        self.toolbar.tools.extend(tools)
        self.toolbar._lazy.discard("tools")

    def add_glyph(self, source, glyph, **kw) -> StaticModel:
        from bokeh.models import GlyphRenderer

        g = StaticModel(GlyphRenderer, data_source=source, glyph=glyph, **kw)
        self.renderers.append(g)
        self._lazy.discard("renderers")
        return g


# -- figure(), column(), row() --------------------------------------------------------

#: figure() keywords that only set a property of the plot (the template's are replaced)
_PLOT_SCALARS = frozenset(
    {"name", "frame_width", "frame_height", "width", "height", "min_border_left"}
    | {"min_border_right", "min_border_top", "min_border_bottom", "output_backend"}
    | {"toolbar_location"}
)


@functools.cache
def _figure_template(key: tuple) -> dict:
    """Serialised ``figure(**kw)`` for one set of structural keywords; the ranges
    passed in are placeholders named ``x_range`` / ``y_range``."""
    from bokeh.models import Range1d
    from bokeh.plotting import figure

    kw = dict(key)
    for r in ("x_range", "y_range"):
        if kw.get(r) == "given":
            kw[r] = Range1d(name=f"__{r}__")
    if kw.get("title") == "given":
        kw["title"] = "__title__"
    p = figure(**kw)
    s = Serializer(deferred=False)
    return {"name": p.__qualified_model__, "attributes": _selected_attributes(p, s)}


def figure(**kw) -> StaticPlot:
    """A static record of ``bokeh.plotting.figure(**kw)``."""
    from bokeh.plotting import figure as bokeh_figure

    ranges = {r: kw.pop(r) for r in ("x_range", "y_range") if isinstance(kw.get(r), StaticModel)}
    scalars = {k: kw.pop(k) for k in list(kw) if k in _PLOT_SCALARS}
    title = kw.pop("title", None)
    key = {k: v for k, v in kw.items()}
    for r in ranges:
        key[r] = "given"
    if isinstance(title, str):
        key["title"] = "given"
    elif title is not None:
        key["title"] = title
    tmpl = _figure_template(tuple(sorted(key.items())))
    p = _new(bokeh_figure)
    ids: dict = {}
    for k, v in tmpl["attributes"].items():
        p._props[k] = _decode(v, ids)
    for r, given in ranges.items():
        p._props[r] = given
    if isinstance(title, str):
        p.title.text = title
    for k, v in scalars.items():
        setattr(p, k, v)
    return p


def column(*children, **kw) -> StaticModel:
    from bokeh.models import Column

    return _box(Column, children, kw)


def row(*children, **kw) -> StaticModel:
    from bokeh.models import Row

    return _box(Row, children, kw)


def _box(cls, children, kw) -> StaticModel:
    # bokeh.layouts.column/row: children as given, sizing_mode passed explicitly
    kw.setdefault("sizing_mode", None)
    return StaticModel(cls, children=list(children), **kw)


# -- the document --------------------------------------------------------------------


class StaticDocument:
    """What ``bokeh.document.Document`` holds for a static view: roots, title and
    document-level browser callbacks."""

    def __init__(self, *, title: str = "Bokeh Application") -> None:
        self.roots: list[StaticModel] = []
        self.title = title
        self.callbacks: dict[str, list] = {}

    def add_root(self, model: StaticModel) -> None:
        self.roots.append(model)

    def js_on_event(self, event: str, *callbacks) -> None:
        from bokeh.events import Event

        lst = self.callbacks.setdefault(Event.cls_for(event).event_name, [])
        lst += [cb for cb in callbacks if cb not in lst]


@functools.cache
def _config_json() -> dict:
    from bokeh.document import Document

    return Serializer(deferred=False).encode(Document()._config)


def document_json(doc: StaticDocument, records: list | None = None) -> dict:
    """The JSON ``Document.to_json(deferred=False)`` writes for the same models.

    ``records``, when given, receives every record of the document (each once, the
    ones its JSON holds), for :func:`resources_bundle`."""
    from bokeh.util.version import __version__

    data_models = _data_models(len(Model.model_class_reverse_map))
    return _document_json(doc, data_models, __version__, records)


@functools.cache
def _data_models(known: int) -> list:
    """Bokeh's data models (``Document.to_json``'s ``defs``), listed once for each
    number of ``known`` model classes (defining a class adds one)."""
    from bokeh.core.has_props import is_DataModel

    return [m for m in Model.model_class_reverse_map.values() if is_DataModel(m)]


def _document_json(
    doc: StaticDocument, data_models: list, version: str, records: list | None = None
) -> dict:
    from ._serialize import _PlainListSerializer

    s = _PlainListSerializer(deferred=False)
    defs = s.encode(data_models)
    config_model = _decode(_config_json(), {})  # alive while encoding: refs go by id()
    config = s.encode(config_model)
    # the records met from here on are the document's: StaticModel.to_serializable
    # lists them in the serialiser's ``records`` (each is encoded once, then a ref)
    s.records = records
    roots = s.encode(doc.roots)
    out = {"version": version, "title": doc.title, "config": config, "roots": roots}
    if data_models:
        out["defs"] = defs
    if doc.callbacks:
        out["callbacks"] = s.encode(doc.callbacks)
    return out


def canonical_ids(doc_json: dict) -> dict:
    """``doc_json`` with model ids renamed in order of first appearance: two documents
    of the same models compare equal although ids are per-process counters."""
    names: dict = {}

    def walk(v) -> None:
        if isinstance(v, dict):
            if isinstance(v.get("id"), str):
                names.setdefault(v["id"], f"m{len(names)}")
            for x in v.values():
                walk(x)
        elif isinstance(v, (list, tuple)):
            for x in v:
                walk(x)

    def rename(v):
        if isinstance(v, dict):
            return {k: names[x] if k == "id" and x in names else rename(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [rename(x) for x in v]
        return v

    walk(doc_json)
    return rename(doc_json)


# -- the builders' namespace -----------------------------------------------------------


class _Kit:
    """``kit.Name(...)`` makes a bokeh model, or a static record inside ``static()``."""

    def __getattr__(self, name: str):
        if name in ("figure", "column", "row"):
            return functools.partial(_dispatch_layout, name)
        return functools.partial(_dispatch, name)


#: positional arguments bokeh's constructors take
_POSITIONAL = {"ColumnDataSource": ("data",), "Range1d": ("start", "end")}


def _dispatch(name: str, /, *args, **kw):
    import bokeh.models

    cls = getattr(bokeh.models, name)
    if _STATIC.get():
        if args and len(args) <= len(_POSITIONAL.get(name, ())):
            kw.update(zip(_POSITIONAL[name], args, strict=False))
            args = ()
        if args:
            raise TypeError(f"static {name}: keyword arguments only")
        return StaticModel(cls, **kw)
    return cls(*args, **kw)


def _dispatch_layout(name: str, /, *args, **kw):
    if _STATIC.get():
        return globals()[name](*args, **kw)
    if name == "figure":
        from bokeh.plotting import figure as f

        return f(*args, **kw)
    import bokeh.layouts

    return getattr(bokeh.layouts, name)(*args, **kw)


def is_a(obj, cls: type) -> bool:
    """``isinstance`` for bokeh models and static records alike."""
    return obj.is_a(cls) if isinstance(obj, StaticModel) else isinstance(obj, cls)


#: ``models.BoxAnnotation(...)``, ``models.figure(...)``: see :class:`_Kit`
models = _Kit()


# -- the page ----------------------------------------------------------------------------


def _models_of(doc: StaticDocument) -> list[StaticModel]:
    """Every record reachable from the roots (the document's models)."""
    seen: dict[int, StaticModel] = {}
    stack: list = list(doc.roots) + [cb for cbs in doc.callbacks.values() for cb in cbs]
    while stack:
        v = stack.pop()
        if isinstance(v, StaticModel):
            if id(v) in seen:
                continue
            seen[id(v)] = v
            stack.extend(v._props.values())
        elif isinstance(v, (list, tuple)):
            stack.extend(v)
        elif isinstance(v, dict):
            stack.extend(v.values())
    return list(seen.values())


def _needs_mathjax(m: StaticModel) -> bool:
    # bokeh.embed.bundle._model_requires_mathjax, on records
    from bokeh.embed.util import contains_tex_string
    from bokeh.models import Axis, Div, Paragraph, TextAnnotation
    from bokeh.models.widgets.sliders import AbstractSlider

    def tex(v) -> bool:
        return isinstance(v, str) and contains_tex_string(v)

    if m.is_a(TextAnnotation) and tex(m.text):
        return True
    if m.is_a(AbstractSlider) and tex(m.title):
        return True
    if m.is_a(Axis):
        overrides = m.major_label_overrides
        if tex(m.axis_label) or (
            isinstance(overrides, dict) and any(map(tex, overrides.values()))
        ):
            return True
    if m.is_a(Div) and not m.disable_math and not m.render_as_text and tex(m.text):
        return True
    return m.is_a(Paragraph) and not m.disable_math and tex(m.text)


@functools.cache
def _stand_ins(widgets: bool, tables: bool, gl: bool, mathjax: bool) -> tuple:
    """Bokeh models that make bokeh's bundle choose the same BokehJS files."""
    from bokeh.models import DataTable, Div, Plot

    out = []
    if widgets:
        out.append(Div())
    if tables:
        out.append(DataTable())
    if gl:
        out.append(Plot(output_backend="webgl"))
    if mathjax:
        out.append(Div(text="$$x$$"))
    return tuple(out)


class _References:
    """What ``bundle_for_objs_and_resources`` asks of a model: ``references()``."""

    def __init__(self, objs) -> None:
        self._objs = set(objs)

    def references(self) -> set:
        return self._objs


def resources_bundle(doc: StaticDocument, resources, records: list | None = None):
    """``bokeh.embed.bundle.bundle_for_objs_and_resources`` for a static document
    (``records``: the document's records as :func:`document_json` listed them; by
    default they are found by a walk from the roots).

    The bundle depends only on what the records need and on ``resources``: it is made
    once for each (kept while ``resources`` is the same object and bokeh knows the
    same model classes)."""
    from bokeh.embed.bundle import bundle_for_objs_and_resources

    flags = _bundle_flags(_models_of(doc) if records is None else records)
    key = (flags, id(resources), len(Model.model_class_reverse_map))
    got = _BUNDLES.get(key)
    if got is None or got[0] is not resources:
        if len(_BUNDLES) >= 16:
            _BUNDLES.clear()
        made = bundle_for_objs_and_resources([_References(_stand_ins(*flags))], resources)
        got = _BUNDLES[key] = (resources, made)
    return got[1]


#: bundles made, by (flags, id of the resources, known classes): (resources, bundle)
_BUNDLES: dict = {}


def _bundle_flags(records: list[StaticModel]) -> tuple[bool, bool, bool, bool]:
    """Whether the records hold a widget, a table, a WebGL plot, math: by class, and
    for the few classes that carry text or a backend, by value."""
    widget = table = gl = math = False
    for m in records:
        is_widget, is_table, is_plot, is_math, may_tex = m._info.bundle_kinds()
        widget = widget or is_widget
        table = table or is_table
        gl = gl or (is_plot and m.output_backend == "webgl")
        math = math or is_math or (may_tex and _needs_mathjax(m))
    return widget, table, gl, math


def file_html(doc: StaticDocument, resources, *, title: str, template=None, variables=None) -> str:
    """``bokeh.embed.file_html`` of a static document: the same page."""
    from bokeh.core.templates import FILE
    from bokeh.embed.elements import html_page_for_render_items
    from bokeh.embed.util import RenderItem
    from bokeh.util.serialization import make_globally_unique_css_safe_id, make_globally_unique_id

    docid = make_globally_unique_id()
    roots = {r: make_globally_unique_css_safe_id() for r in doc.roots}
    records: list[StaticModel] = []
    docs_json = {docid: document_json(doc, records)}
    return html_page_for_render_items(
        resources_bundle(doc, resources, records),
        docs_json,
        [RenderItem(docid, roots=roots)],
        title=title,
        template=FILE if template is None else template,
        template_variables=variables or {},
    )
