"""A document's JSON as ``Document.to_json(deferred=False)`` gives it, in less time.

Bokeh's serialiser asks every model for the value of every property (about 50 each)
and only then drops the ones still at their default: it builds each default to throw it
away. A report page holds ~300 models, so that is most of the time its JSON takes.
:func:`document_json` selects the same properties first (the ones set, the ones whose
defaults bokeh materialised at construction, the themed ones) and reads only those.
The output is the same dict (``tests/test_views.py`` compares it with bokeh's own),
except that array buffers are gzip streams of libdeflate when the system has it (see
:func:`_gzip_base64`): other bytes, the same arrays once inflated.
"""

from __future__ import annotations

import base64
import math
from typing import Any

from bokeh.core.has_props import is_DataModel
from bokeh.core.property.wrappers import PropertyValueContainer
from bokeh.core.serialization import Buffer, BytesRep, Serializer
from bokeh.document import Document
from bokeh.model import Model
from bokeh.settings import settings
from bokeh.util.version import __version__ as _bokeh_version

from ..io._inflate import gzip_compress

__all__ = ["document_json"]


#: item types whose JSON is the item itself (bokeh's _encode_str / _encode_bool)
_SELF_ENCODED = frozenset({str, bool, type(None)})
_MAX_SAFE_INT = 2**53 - 1  # bokeh.core.serialization: larger ints become floats


def _plain_items(items: list) -> bool:
    """Whether bokeh would encode every item of ``items`` as the item itself: strings,
    booleans, None, ints within JavaScript's safe range, finite floats."""
    kinds = set(map(type, items))
    if kinds <= _SELF_ENCODED:
        return True
    if not kinds <= _SELF_ENCODED | {int, float}:
        return False
    for x in items:
        t = type(x)
        if t is int:
            if not -_MAX_SAFE_INT < x <= _MAX_SAFE_INT:
                return False
        elif t is float and not math.isfinite(x):
            return False
    return True


class _PlainListSerializer(Serializer):
    """Bokeh's serializer, with plain values (strings, booleans, None, safe integers,
    finite floats) returned as they are and lists of them copied in one step instead
    of encoded item by item: the same JSON."""

    #: when a list, static records append themselves as they are encoded
    records: list | None = None

    def encode(self, obj: Any):
        t = type(obj)
        if t is str or t is bool or obj is None:
            return obj
        if (t is int and -_MAX_SAFE_INT < obj <= _MAX_SAFE_INT) or (
            t is float and math.isfinite(obj)
        ):
            return obj
        return super().encode(obj)

    def _encode_list(self, obj: list[Any]):
        if _plain_items(obj):
            return list(obj)
        return super()._encode_list(obj)

    def _encode_bytes(self, obj) -> BytesRep:
        if self._deferred:  # buffers sent apart (server, notebook comms): bokeh's own
            return super()._encode_bytes(obj)
        return BytesRep(type="bytes", data=_gzip_base64(obj))


def _gzip_base64(data) -> str:
    """``Buffer(...).to_base64()``: the bytes gzipped at bokeh's compression level, in
    base64; gzipped by libdeflate when the system has it (half zlib's time, the same
    bytes once inflated), else by bokeh itself."""
    packed = gzip_compress(data, settings.compression_level())
    if packed is None:
        return Buffer(None, data).to_base64()  # the id is not part of the text
    return base64.b64encode(packed).decode("ascii")


class _Serializer(_PlainListSerializer):
    """Bokeh's serializer, with models encoded from their selected properties only."""

    def _encode(self, obj: Any):
        # only plain models: anything overriding to_serializable keeps its own
        if isinstance(obj, Model) and type(obj).to_serializable is Model.to_serializable:
            return _model_rep(obj, self)
        return super()._encode(obj)


def _model_rep(model: Model, serializer: Serializer) -> dict:
    # Model.to_serializable + HasProps.query_properties_with_values(include_defaults=False)
    # with the selection done before the values are read
    serializer.add_ref(model, model.ref)
    selected = set(model._property_values) | set(model._unstable_default_values)
    themed = model.themed_values() or {}
    selected |= set(themed)
    attributes = {}
    for key in model.properties(_with_props=True):
        if key not in selected:
            continue
        descriptor = model.lookup(key)
        if not descriptor.serialized:
            continue
        value = descriptor.get_value(model)
        if (
            key not in themed
            and isinstance(value, PropertyValueContainer)
            and key in model._unstable_default_values
        ):
            continue
        attributes[key] = serializer.encode(value)
    rep = {"type": "object", "name": model.__qualified_model__, "id": model.id}
    if attributes:
        rep["attributes"] = attributes
    return rep


def document_json(doc: Document) -> dict:
    """``doc.to_json(deferred=False)``, with the properties picked before they are read.

    Parameters
    ----------
    doc : bokeh.document.Document

    Returns
    -------
    dict
        The document's JSON (binary buffers inline as base64).

    Examples
    --------
    >>> from bokeh.document import Document
    >>> from bokeh.models import Div
    >>> doc = Document()
    >>> doc.add_root(Div(text="hello"))
    >>> document_json(doc) == doc.to_json(deferred=False)
    True
    """
    from ._static import StaticDocument
    from ._static import document_json as static_json

    if isinstance(doc, StaticDocument):
        return static_json(doc)
    if settings.serialize_include_defaults():
        return doc.to_json(deferred=False)
    try:
        return _document_json(doc)
    except AttributeError:  # a bokeh whose internals moved: its own (slower) path
        return doc.to_json(deferred=False)


def _document_json(doc: Document) -> dict:
    data_models = [m for m in Model.model_class_reverse_map.values() if is_DataModel(m)]
    s = _Serializer(deferred=False)
    defs = s.encode(data_models)
    config = s.encode(doc._config)
    roots = s.encode(doc._roots)
    callbacks = s.encode(doc.callbacks.js_event_callbacks)
    out = {"version": _bokeh_version, "title": doc.title, "config": config, "roots": roots}
    if data_models:
        out["defs"] = defs
    if doc.callbacks.js_event_callbacks:
        out["callbacks"] = callbacks
    doc.models.flush_synced()
    return out
