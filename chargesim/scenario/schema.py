"""A small declarative schema for scenario documents, and its validator.

Each key of the vocabulary is a node that knows its meaning, SI unit, default
and allowed values. :func:`validate` walks a parsed TOML document against the
tree, converts every quantity to SI (floats, numpy arrays), fills in the
defaults, and raises :class:`ScenarioError` at the first problem with the key
path, the bad value and what is allowed. The same tree renders the reference
section of ``docs/scenario.md`` (:func:`render_markdown`), so the documentation
cannot drift from what the loader accepts.
"""
import difflib
import math

import numpy as np

from .errors import ScenarioError
from .units import dimension_name, to_si

#: Marker of a required key.
REQUIRED = object()


class Fail(Exception):
    """Raised inside the validator; carries the key path and the reason."""

    def __init__(self, path, reason):
        super().__init__(reason)
        self.path = path
        self.reason = reason


def show(value, limit=60):
    """A short printable form of a bad value for messages."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def suggest(name, known):
    """``" (did you mean 'x'?)"`` for the nearest known key, or ""."""
    close = difflib.get_close_matches(str(name), list(known), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


class Node:
    """One key of the vocabulary: its documentation and its default."""

    kind = "value"

    def __init__(self, doc, default=REQUIRED, default_doc=None):
        self.doc = doc
        self.default = default
        self.default_doc = default_doc

    @property
    def required(self):
        return self.default is REQUIRED

    def convert(self, value, path):  # pragma: no cover - every node overrides
        raise NotImplementedError

    def describe_default(self):
        if self.default_doc is not None:
            return self.default_doc
        if self.required:
            return "required"
        if self.default is None:
            return "none"
        return "`" + _toml_repr(self.default) + "`"

    def describe_allowed(self):
        return ""

    def describe_unit(self):
        return ""


def _toml_repr(value):
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value + '"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_repr(v) for v in value) + "]"
    return repr(value)


def _bounds_text(lo, hi, lo_open, hi_open):
    parts = []
    if lo is not None:
        parts.append(("> " if lo_open else ">= ") + f"{lo:g}")
    if hi is not None:
        parts.append(("< " if hi_open else "<= ") + f"{hi:g}")
    return " and ".join(parts)


class Quantity(Node):
    """A number with a unit: a plain number (SI) or a string "30 kV"."""

    kind = "quantity"

    def __init__(self, doc, unit, default=REQUIRED, *, lo=None, hi=None, lo_open=False, hi_open=False,
                 why=None, default_doc=None):
        super().__init__(doc, default, default_doc)
        self.unit = unit
        self.lo, self.hi, self.lo_open, self.hi_open = lo, hi, lo_open, hi_open
        self.why = why  # the physical reason behind the bounds, for messages

    def check_bounds(self, x, path, value):
        bad = (
            (self.lo is not None and (x <= self.lo if self.lo_open else x < self.lo))
            or (self.hi is not None and (x >= self.hi if self.hi_open else x > self.hi))
        )
        if bad:
            reason = f"{show(value)} is out of range: must be {_bounds_text(self.lo, self.hi, self.lo_open, self.hi_open)}"
            if self.unit != "1":
                reason += f" {self.unit}"
            if self.why:
                reason += f" ({self.why})"
            raise Fail(path, reason)

    def convert(self, value, path):
        try:
            x = to_si(value, self.unit)
        except ValueError as exc:
            raise Fail(path, f"{exc}; got {show(value)}") from None
        self.check_bounds(x, path, value)
        return x

    def describe_unit(self):
        return f"{dimension_name(self.unit)} ({self.unit})" if self.unit != "1" else "dimensionless"

    def describe_allowed(self):
        text = _bounds_text(self.lo, self.hi, self.lo_open, self.hi_open)
        return text or "any finite value"


class Integer(Node):
    """A whole number (TOML integer)."""

    kind = "integer"

    def __init__(self, doc, default=REQUIRED, *, lo=None, hi=None, default_doc=None):
        super().__init__(doc, default, default_doc)
        self.lo, self.hi = lo, hi

    def convert(self, value, path):
        if isinstance(value, bool) or not isinstance(value, int):
            if isinstance(value, float) and math.isfinite(value) and value == int(value):
                value = int(value)
            else:
                raise Fail(path, f"expected a whole number, got {show(value)}")
        if (self.lo is not None and value < self.lo) or (self.hi is not None and value > self.hi):
            raise Fail(path, f"{value} is out of range: must be {_bounds_text(self.lo, self.hi, False, False)}")
        return int(value)

    def describe_unit(self):
        return "count"

    def describe_allowed(self):
        return _bounds_text(self.lo, self.hi, False, False) or "any whole number"


class Boolean(Node):
    """true or false."""

    kind = "boolean"

    def convert(self, value, path):
        if not isinstance(value, bool):
            raise Fail(path, f"expected true or false, got {show(value)}")
        return value

    def describe_allowed(self):
        return "`true`, `false`"


class Text(Node):
    """Free text (names, titles)."""

    kind = "text"

    def __init__(self, doc, default=REQUIRED, *, max_len=200, name=False, default_doc=None):
        super().__init__(doc, default, default_doc)
        self.max_len = max_len
        self.name = name  # a name used in files: no slashes or control characters

    def convert(self, value, path):
        if not isinstance(value, str):
            raise Fail(path, f"expected a string, got {show(value)}")
        if len(value) > self.max_len:
            raise Fail(path, f"text longer than {self.max_len} characters")
        if self.name:
            if not value or any(c in value for c in "/\\.") or not value.isprintable() or value.strip() != value:
                raise Fail(path, f"{show(value)} is not a valid name: use letters, digits, '-' and '_' "
                                 "(no slashes, dots or surrounding spaces)")
        return value

    def describe_allowed(self):
        return "a name: letters, digits, `-`, `_`" if self.name else "any text"


class Choice(Node):
    """One of a fixed set of words."""

    kind = "choice"

    def __init__(self, doc, values, default=REQUIRED, default_doc=None):
        super().__init__(doc, default, default_doc)
        self.values = tuple(values)

    def convert(self, value, path):
        if not isinstance(value, str) or value not in self.values:
            allowed = ", ".join(repr(v) for v in self.values)
            hint = suggest(value, self.values) if isinstance(value, str) else ""
            raise Fail(path, f"{show(value)} is not allowed; allowed: {allowed}{hint}")
        return value

    def describe_allowed(self):
        return ", ".join(f"`\"{v}\"`" for v in self.values)


class Vector(Node):
    """A fixed-length list of quantities, e.g. a point [x, y, z]."""

    kind = "vector"

    def __init__(self, doc, unit, default=REQUIRED, *, n=3, lo=None, lo_open=False, default_doc=None):
        super().__init__(doc, default, default_doc)
        self.unit, self.n = unit, n
        self.item = Quantity(doc, unit, lo=lo, lo_open=lo_open)

    def convert(self, value, path):
        if not isinstance(value, list) or len(value) != self.n:
            raise Fail(path, f"expected a list of {self.n} values ({dimension_name(self.unit)}), got {show(value)}")
        return np.array([self.item.convert(v, f"{path}[{i}]") for i, v in enumerate(value)], dtype=np.float64)

    def describe_unit(self):
        return f"{self.n} x " + self.item.describe_unit()

    def describe_allowed(self):
        return f"list of {self.n}; each " + self.item.describe_allowed()


class IntegerVector(Node):
    """A fixed-length list of whole numbers, e.g. grid points per axis."""

    kind = "integers"

    def __init__(self, doc, default=REQUIRED, *, n=3, lo=None, hi=None, default_doc=None):
        super().__init__(doc, default, default_doc)
        self.n = n
        self.item = Integer(doc, lo=lo, hi=hi)

    def convert(self, value, path):
        if not isinstance(value, list) or len(value) != self.n:
            raise Fail(path, f"expected a list of {self.n} whole numbers, got {show(value)}")
        return tuple(self.item.convert(v, f"{path}[{i}]") for i, v in enumerate(value))

    def describe_unit(self):
        return f"{self.n} counts"

    def describe_allowed(self):
        return f"list of {self.n}; each " + self.item.describe_allowed()


class QuantityList(Node):
    """A list of quantities of any length (at least ``min_len``)."""

    kind = "list"

    def __init__(self, doc, unit, default=REQUIRED, *, min_len=1, max_len=100000, lo=None, lo_open=False,
                 why=None, default_doc=None):
        super().__init__(doc, default, default_doc)
        self.unit, self.min_len, self.max_len = unit, min_len, max_len
        self.item = Quantity(doc, unit, lo=lo, lo_open=lo_open, why=why)

    def convert(self, value, path):
        if not isinstance(value, list) or not (self.min_len <= len(value) <= self.max_len):
            raise Fail(path, f"expected a list of {self.min_len} to {self.max_len} values "
                             f"({dimension_name(self.unit)}), got {show(value)}")
        return np.array([self.item.convert(v, f"{path}[{i}]") for i, v in enumerate(value)], dtype=np.float64)

    def describe_unit(self):
        return "list of " + self.item.describe_unit()

    def describe_allowed(self):
        return f"{self.min_len} or more values; each " + self.item.describe_allowed()


class Points(Node):
    """A list of points [[x, y, z], ...] -> array of shape (N, 3)."""

    kind = "points"

    def __init__(self, doc, unit="m", default=REQUIRED, *, min_len=1, max_len=1_000_000, default_doc=None):
        super().__init__(doc, default, default_doc)
        self.unit, self.min_len, self.max_len = unit, min_len, max_len
        self.item = Vector(doc, unit)

    def convert(self, value, path):
        if not isinstance(value, list) or not (self.min_len <= len(value) <= self.max_len):
            raise Fail(path, f"expected a list of {self.min_len} to {self.max_len} points [x, y, z], got {show(value)}")
        out = np.empty((len(value), 3), dtype=np.float64)
        for i, v in enumerate(value):
            out[i] = self.item.convert(v, f"{path}[{i}]")
        return out

    def describe_unit(self):
        return "list of points, " + dimension_name(self.unit) + f" ({self.unit})"

    def describe_allowed(self):
        return f"{self.min_len} or more points `[x, y, z]`"


class Table(Node):
    """A TOML table with named keys; optionally a variant chosen by ``type``.

    Parameters
    ----------
    doc : str
        Meaning of the table.
    fields : dict of str to Node
        Keys every variant takes.
    variants : dict of str to (doc, dict of str to Node), optional
        When given, the table has a required ``type`` key choosing the
        variant, whose extra keys are added to ``fields``.
    """

    kind = "table"

    def __init__(self, doc, fields, *, variants=None, default=None, default_doc=None):
        super().__init__(doc, {} if default is None else default, default_doc)
        self.fields = dict(fields)
        self.variants = variants

    def keys_for(self, variant):
        keys = dict(self.fields)
        if self.variants is not None and variant is not None:
            keys.update(self.variants[variant][1])
        return keys

    def convert(self, value, path):
        if not isinstance(value, dict):
            raise Fail(path, f"expected a table (section), got {show(value)}")
        out = {}
        variant = None
        if self.variants is not None:
            where = f"{path}.type" if path else "type"
            if "type" not in value:
                raise Fail(where, "missing required key; allowed: " + ", ".join(repr(v) for v in self.variants))
            tag = value["type"]
            if not isinstance(tag, str) or tag not in self.variants:
                hint = suggest(tag, self.variants) if isinstance(tag, str) else ""
                raise Fail(where, f"{show(tag)} is not allowed; allowed: "
                                  + ", ".join(repr(v) for v in self.variants) + hint)
            variant = tag
            out["type"] = tag
        keys = self.keys_for(variant)
        for name in value:
            if name == "type" and self.variants is not None:
                continue
            if name not in keys:
                where = f"{path}.{name}" if path else name
                known = list(keys) + (["type"] if self.variants is not None else [])
                extra = f" for type {variant!r}" if variant else ""
                raise Fail(where, f"unknown key{extra}{suggest(name, known)}; known keys here: " + ", ".join(known))
        for name, node in keys.items():
            where = f"{path}.{name}" if path else name
            if name in value:
                out[name] = node.convert(value[name], where)
            elif isinstance(node, Tables) and node.required:
                raise Fail(where, f"missing: at least {node.min_len} [[{name}]] section(s) required ({node.doc.rstrip('.').lower()})")
            elif isinstance(node, Table) and any(f.required for f in node.fields.values()):
                raise Fail(where, f"missing required section [{where}] ({node.doc.split('.')[0].lower()})")
            elif node.required:
                raise Fail(where, f"missing required key ({node.doc.split('.')[0].lower()})")
            elif isinstance(node, (Table, Tables)):
                out[name] = node.convert(node.default, where)
            elif node.default is None:
                out[name] = None
            else:
                out[name] = node.convert(node.default, where)
        return out


class Tables(Node):
    """An array of tables ``[[name]]`` -> list of dicts."""

    kind = "tables"

    def __init__(self, doc, item, *, min_len=0, max_len=10000):
        super().__init__(doc, [])
        self.item, self.min_len, self.max_len = item, min_len, max_len

    def convert(self, value, path):
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            raise Fail(path, f"expected an array of tables ([[{path.split('.')[-1]}]] sections), got {show(value)}")
        if not (self.min_len <= len(value) <= self.max_len):
            raise Fail(path, f"expected {self.min_len} to {self.max_len} entries, got {len(value)}")
        return [self.item.convert(v, f"{path}[{i}]") for i, v in enumerate(value)]

    @property
    def required(self):
        return self.min_len > 0

    def describe_default(self):
        return "none" if self.min_len == 0 else f"at least {self.min_len} required"


def validate(schema, document, file):
    """Validate a parsed TOML document against ``schema``.

    Returns the converted dict (SI, defaults filled in); raises
    :class:`ScenarioError` naming ``file`` and the key path.
    """
    try:
        return schema.convert(document, "")
    except Fail as exc:
        raise ScenarioError(file, exc.path, exc.reason) from None


def render_markdown(schema, *, level=3):
    """Reference tables of every key, for ``docs/scenario.md``."""
    lines = []

    def table_rows(fields, prefix):
        rows = []
        subs = []
        for name, node in fields.items():
            key = f"{prefix}{name}"
            if isinstance(node, (Table, Tables)):
                subs.append((key, node))
                continue
            rows.append(f"| `{key}` | {node.doc} | {node.describe_unit() or '-'} | "
                        f"{node.describe_default()} | {node.describe_allowed() or '-'} |")
        return rows, subs

    header = ["| key | meaning | unit (dimension) | default | allowed |", "|---|---|---|---|---|"]

    def emit(title, node, depth):
        hashes = "#" * min(depth, 6)
        item = node.item if isinstance(node, Tables) else node
        form = f"`[[{title}]]` (array of tables)" if isinstance(node, Tables) else f"`[{title}]`"
        if not title:
            form = "top level"
        lines.append(f"{hashes} {form}")
        lines.append("")
        lines.append(node.doc)
        lines.append("")
        rows, subs = table_rows(item.fields, "")
        if item.variants is not None:
            rows.insert(0, "| `type` | Which kind (chooses the keys below) | - | required | "
                        + ", ".join(f"`\"{v}\"`" for v in item.variants) + " |")
        if rows:
            lines.extend(header + rows)
            lines.append("")
        if item.variants is not None:
            for tag, (vdoc, vfields) in item.variants.items():
                lines.append(f"**`type = \"{tag}\"`**: {vdoc}")
                lines.append("")
                vrows, vsubs = table_rows(vfields, "")
                if vrows:
                    lines.extend(header + vrows)
                    lines.append("")
                subs.extend(vsubs)
        for key, sub in subs:
            emit(f"{title}.{key}" if title else key, sub, depth + 1)

    emit("", schema, level)
    return "\n".join(lines).rstrip() + "\n"
