"""Value kinds for the config schema: each checks one YAML value and says what is allowed.

Kept apart from the section tables in ``daemon.config`` so that file reads as the schema.
"""
from __future__ import annotations

import dataclasses
import difflib
import ipaddress
import math
import os
import re
import stat
from typing import Callable

import yaml



class _Bad:
    def __repr__(self) -> str:
        return "<invalid>"


BAD = _Bad()                     # a value that failed; its problem is already recorded
SOCKET_PATH_MAX = 107            # Linux sun_path is 108 bytes including the NUL (unix(7))
# PyYAML follows YAML 1.1, which reads 1e-3 (no dot) as text; users mean a number.
_EXP_NUMBER = re.compile(r"[-+]?(\d+\.?\d*|\.\d+)[eE][-+]?\d+")
_NAME = re.compile(r"[A-Za-z0-9_]+")
_NODE = re.compile(r"[A-Za-z0-9_-]+")
_DOT_PATH = re.compile(r"[^.\s]+(\.[^.\s]+)*")
_HOST = re.compile(r"[A-Za-z0-9._-]+|[0-9A-Fa-f:.]+")
INLINE_PASSWORD = ("an inline password is refused: put the password alone in a file only the "
                   "daemon's user can read (chmod 600) and set password_file to its path")


class _Ctx:
    """Where relative paths start, whether to check like ``run`` does before it connects
    (``preflight``), and the problems found so far."""

    def __init__(self, base_dir: str | None, preflight: bool = False) -> None:
        self.base_dir = base_dir
        self.preflight = preflight
        self.problems: list[str] = []

    def bad(self, path: str, message: str) -> _Bad:
        self.problems.append(f"{path or '(top level)'}: {message}")
        return BAD


def show(value: object) -> str:
    """A value as the user would have typed it in YAML, short enough for one message line."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (str, int, float)):
        return repr(value)
    try:
        text = yaml.safe_dump(value, default_flow_style=True, width=10**6).strip()
    except yaml.YAMLError:
        text = repr(value)
    text = text.removesuffix("\n...").strip()
    return text if len(text) <= 60 else text[:57] + "..."


def _what(value: object) -> str:
    for kind, word in ((bool, "a boolean"), (int, "an integer"), (float, "a number"),
                       (str, "a string"), (list, "a list"), (dict, "a mapping")):
        if isinstance(value, kind):
            return word
    return "null" if value is None else f"a {type(value).__name__}"


def _wrong(value: object, expected: str, path: str, ctx: _Ctx) -> _Bad:
    if value is None:
        return ctx.bad(path, f"null is not allowed here; expected {expected}")
    hint = ""
    if isinstance(value, bool) and "string" in expected:
        hint = " (YAML reads yes/no/on/off/true/false as booleans; quote the text)"
    return ctx.bad(path, f"{show(value)} is {_what(value)}; expected {expected}{hint}")


def _suggest(word: str, options) -> str:
    close = difflib.get_close_matches(word, list(options), n=1)
    return f"; did you mean {close[0]!r}?" if close else ""


def _num(x: float) -> str:
    return str(int(x)) if float(x).is_integer() else repr(x)


def _range_text(lo, hi, lo_open: bool, hi_open: bool) -> str:
    if lo is not None and hi is not None:
        return f"{'(' if lo_open else '['}{_num(lo)}, {_num(hi)}{')' if hi_open else ']'}"
    if lo is not None:
        return f"{'>' if lo_open else '>='} {_num(lo)}"
    return f"{'<' if hi_open else '<='} {_num(hi)}"


# ---- value kinds: each is called as kind(value, key_path, ctx) and returns the value or BAD ----

class _Int:
    def __init__(self, lo: int | None = None, hi: int | None = None) -> None:
        self.lo, self.hi = lo, hi

    def __call__(self, v, path, ctx):
        if isinstance(v, bool) or not isinstance(v, int):
            return _wrong(v, "an integer", path, ctx)
        if (self.lo is not None and v < self.lo) or (self.hi is not None and v > self.hi):
            rng = _range_text(self.lo, self.hi, False, False)
            return ctx.bad(path, f"{show(v)} is out of range; allowed {rng}")
        return v


class _Float:
    def __init__(self, lo=None, hi=None, lo_open=False, hi_open=False) -> None:
        self.lo, self.hi, self.lo_open, self.hi_open = lo, hi, lo_open, hi_open

    def __call__(self, v, path, ctx):
        if isinstance(v, str) and _EXP_NUMBER.fullmatch(v.strip()):
            v = float(v)
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            return _wrong(v, "a number", path, ctx)
        v = float(v)
        if not math.isfinite(v):
            return ctx.bad(path, f"{show(v)} is not a finite number")
        lo_bad = self.lo is not None and (v <= self.lo if self.lo_open else v < self.lo)
        hi_bad = self.hi is not None and (v >= self.hi if self.hi_open else v > self.hi)
        if lo_bad or hi_bad:
            rng = _range_text(self.lo, self.hi, self.lo_open, self.hi_open)
            return ctx.bad(path, f"{show(v)} is out of range; allowed {rng}")
        return v


def _bool(v, path, ctx):
    return v if isinstance(v, bool) else _wrong(v, "true or false", path, ctx)


class _Choice:
    def __init__(self, *choices: str, aliases: dict | None = None) -> None:
        self.choices, self.aliases = choices, aliases or {}

    def __call__(self, v, path, ctx):
        if isinstance(v, (int, str)) and not isinstance(v, bool) and v in self.aliases:
            return self.aliases[v]
        allowed = ", ".join(repr(c) for c in self.choices)
        if not isinstance(v, str):
            return _wrong(v, f"one of {allowed}", path, ctx)
        if v not in self.choices:
            return ctx.bad(path, f"{show(v)} is not one of {allowed}{_suggest(v, self.choices)}")
        return v


class _Str:
    def __init__(self, pattern: re.Pattern | None = None, rule: str = "") -> None:
        self.pattern, self.rule = pattern, rule

    def __call__(self, v, path, ctx):
        if not isinstance(v, str):
            return _wrong(v, "a string", path, ctx)
        if not v:
            return ctx.bad(path, "'' is empty; give a value or leave the key out")
        if self.pattern is not None and not self.pattern.fullmatch(v):
            return ctx.bad(path, f"{show(v)} is not allowed; {self.rule}")
        return v


class _Topic:
    def __init__(self, publish: bool = False) -> None:
        self.publish = publish

    def __call__(self, v, path, ctx):
        if not isinstance(v, str):
            return _wrong(v, "an MQTT topic string", path, ctx)
        if not v:
            return ctx.bad(path, "'' is empty; an MQTT topic needs at least one character")
        for wildcard in "+#":
            if wildcard in v:
                why = ("publish topics may not contain wildcards" if self.publish else
                       "subscribe to one exact topic here (wildcards are not allowed)")
                return ctx.bad(path, f"{show(v)} contains the wildcard {wildcard!r}; {why}")
        if "\0" in v or len(v.encode("utf-8")) > 65535:   # MQTT 3.1.1 section 4.7.3
            return ctx.bad(path, f"{show(v)} is not a valid MQTT topic (NUL or over 65535 bytes)")
        return v


class _Path:
    def __init__(self, must_exist: bool = False, secret: bool = False, is_dir: bool = False):
        self.must_exist, self.secret, self.is_dir = must_exist, secret, is_dir

    def resolve(self, v: str, ctx: _Ctx) -> str:
        v = os.path.expanduser(v)
        if ctx.base_dir is not None and not os.path.isabs(v):
            v = os.path.join(ctx.base_dir, v)
        return os.path.normpath(v)

    def __call__(self, v, path, ctx):
        if not isinstance(v, str):
            return _wrong(v, "a file path string", path, ctx)
        if not v:
            return ctx.bad(path, "'' is empty; give a path or leave the key out")
        p = self.resolve(v, ctx)
        if self.is_dir and os.path.exists(p) and not os.path.isdir(p):
            return ctx.bad(path, f"{show(p)} exists and is not a directory")
        if self.must_exist and not os.path.isfile(p):
            what = "is not a regular file" if os.path.exists(p) else "does not exist"
            return ctx.bad(path, f"{show(p)} {what}")
        if self.secret:
            mode = stat.S_IMODE(os.stat(p).st_mode)
            if mode & 0o077:
                return ctx.bad(path, f"{show(p)} has mode {mode:04o} and is readable by "
                                     f"group/others; chmod 600 it")
        return p


def _listen(v, path, ctx):
    if not isinstance(v, str):
        return _wrong(v, "'HOST:PORT' or null", path, ctx)
    m = re.fullmatch(r"\[([0-9A-Fa-f:.]+)\]:(\d{1,5})|([A-Za-z0-9._-]+):(\d{1,5})", v)
    ok = m is not None and 0 <= int(m.group(2) or m.group(4)) <= 65535
    if ok and m.group(1):
        try:
            ipaddress.IPv6Address(m.group(1))
        except ValueError:
            ok = False
    if not ok:
        return ctx.bad(path, f"{show(v)} is not HOST:PORT with port 0..65535; e.g. "
                             f"'127.0.0.1:9740' or '[::1]:9740' (port 0 picks a free port and logs it; "
                             f"null disables the endpoint)")
    return v


class _IntList:
    def __init__(self, item: _Int, max_len: int, what: str) -> None:
        self.item, self.max_len, self.what = item, max_len, what

    def __call__(self, v, path, ctx):
        if not isinstance(v, (list, tuple)):
            return _wrong(v, "a list of integers like [32, 32]", path, ctx)
        if len(v) > self.max_len:
            return ctx.bad(path, f"{show(list(v))} has {len(v)} {self.what}; allowed at most "
                                 f"{self.max_len}")
        items = tuple(self.item(x, f"{path}[{i}]", ctx) for i, x in enumerate(v))
        return BAD if BAD in items else items


# An input's history is bounded by a count of readings (align.history), not by an age, so no
# setting says how far back a lag can reach; nor does anything bound an age or a period. 30 days
# is a plain sanity limit for all of them (common practice, no source): far beyond any lag,
# staleness or save period a soft sensor uses, and it refuses values such as 1e300 (every sample
# skipped as stale) or a mistyped 3e7 (no checkpoint for a year).
MAX_SECONDS = 30 * 86400


def _lag(v, path, ctx):
    lag = _Float(0)(v, path, ctx)
    if lag is not BAD and lag > MAX_SECONDS:
        return ctx.bad(path, f"{show(lag)} is out of range; allowed [0, {MAX_SECONDS}] seconds "
                             f"(30 days)")
    return lag


def seconds(zero_allowed: bool = False) -> _Float:
    """A duration in seconds: above 0 (or from 0) and at most MAX_SECONDS."""
    return _Float(0, MAX_SECONDS, lo_open=not zero_allowed)


def _lags(v, path, ctx):
    if not isinstance(v, (list, tuple)):
        return _wrong(v, "a list of lags in seconds like [0, 30]", path, ctx)
    if not 1 <= len(v) <= 64:
        return ctx.bad(path, f"{show(list(v))} has {len(v)} lags; allowed 1 to 64")
    items = tuple(_lag(x, f"{path}[{i}]", ctx) for i, x in enumerate(v))
    if BAD in items:
        return BAD
    for i, lag in enumerate(items):
        if lag in items[:i]:
            return ctx.bad(f"{path}[{i}]", f"{show(lag)} appears twice in {show(list(v))}; "
                                           f"give each lag once")
    return items


# ---- sections --------------------------------------------------------------------------------

Check = Callable[[dict, dict, str, _Ctx], None]


class _Section:
    """A mapping validated key by key into ``cls``; keys not in the table are reported."""

    def __init__(self, cls, keys: dict, nullable: bool = False, checks: tuple[Check, ...] = (),
                 refused: dict[str, str] | None = None) -> None:
        self.cls, self.keys, self.nullable = cls, keys, nullable
        self.checks, self.refused = checks, refused or {}
        self.fields = {f.name: f for f in dataclasses.fields(cls)}

    def __call__(self, raw, path, ctx):
        if raw is None:
            if self.nullable:
                return None
            raw = {}                      # a section left empty in YAML takes every default
        if not isinstance(raw, dict):
            return _wrong(raw, "a mapping of keys", path, ctx)
        for k in raw:
            if k in self.refused:
                ctx.bad(_join(path, k), self.refused[k])
            elif k not in self.keys:
                hint = _suggest(str(k), self.keys) or f"; allowed keys: {', '.join(self.keys)}"
                ctx.bad(_join(path, str(k)), f"unknown key{hint}")
        values = {name: self._one(name, kind, raw, _join(path, name), ctx)
                  for name, kind in self.keys.items()}
        for check in self.checks:
            check(values, raw, path, ctx)
        if any(_is_bad(v) for v in values.values()):
            return BAD
        return self.cls(**values)

    def _one(self, name, kind, raw, path, ctx):
        f = self.fields[name]
        if name in raw:
            if raw[name] is None and str(f.type).startswith("Optional["):
                return None
            return kind(raw[name], path, ctx)
        if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            return ctx.bad(path, "required key is missing")
        if isinstance(kind, _Section) and not kind.nullable:
            return kind({}, path, ctx)
        default = f.default if f.default is not dataclasses.MISSING else f.default_factory()
        if isinstance(kind, _Path) and default is not None:
            return kind.resolve(default, ctx)
        return default


class _ListOf:
    """A non-empty list of sections whose ``name`` keys must differ."""

    def __init__(self, item: _Section, what: str) -> None:
        self.item, self.what = item, what

    def __call__(self, raw, path, ctx):
        if not isinstance(raw, list):
            return _wrong(raw, f"a list of {self.what}s", path, ctx)
        if not raw:
            return ctx.bad(path, f"[] is empty; give at least one {self.what}")
        items = tuple(_wrong(x, "a mapping of keys", f"{path}[{i}]", ctx) if x is None
                      else self.item(x, f"{path}[{i}]", ctx) for i, x in enumerate(raw))
        first: dict[str, int] = {}
        leaf = path.rsplit(".", 1)[-1]
        for i, x in enumerate(raw):
            name = x.get("name") if isinstance(x, dict) else None
            if isinstance(name, str) and name in first:
                ctx.bad(f"{path}[{i}].name", f"{show(name)} duplicates {leaf}[{first[name]}].name")
            elif isinstance(name, str):
                first[name] = i
        return items


def _join(path: str, key: object) -> str:
    return f"{path}.{key}" if path else str(key)


def _is_bad(v: object) -> bool:
    return v is BAD or (isinstance(v, tuple) and any(x is BAD for x in v))


def _ok(values: dict, *names: str) -> bool:
    return all(not _is_bad(values[n]) for n in names)


