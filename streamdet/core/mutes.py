"""Silences and maintenance windows: which series are muted over which span of data time.

A :class:`Mute` selects series with the same matcher a rule uses (metric glob, label globs,
regular expressions or their negations) over ``[start, end)`` in data time. A muted step raises
no new breach; with ``learn: false`` it also teaches nothing (the step is skipped as if it had
never arrived, unless a breach is open: then it is still judged so the breach can close).
:class:`Mutes` is the engine's table of them, with a version that invalidates the engine's
per-row match cache. Pure: no clock (expiry goes by the engine's data time), no I/O.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from streamdet.config import Match

MAX_MUTES = 100  # entries in one table (config and API together); each costs 2 bytes per series
# of match cache while a wave falls in its window
MAX_TEXT = 500  # characters of a comment or created_by
MAX_ID = 100  # characters of an id
MAX_PATTERN = 200  # characters of a glob or regular expression in a mute's matcher
MAX_LABELS = 20  # label matchers per mute
_ID = re.compile(r"[A-Za-z0-9_.:-]+")
# Constructs that make Python's backtracking matcher slow or unbounded: back-references,
# look-arounds, conditionals, and a quantifier applied to a group (nested repetition).
_UNSAFE = re.compile(r"\\[1-9]|\(\?P=|\(\?<?[=!]|\(\?\(|\)[*+?{]")
# Unbounded repetitions allowed in one expression: each one multiplies the worst-case work by
# the label value's length (``.*a.*`` is quadratic at worst, three would be cubic).
MAX_REPEATS = 2
_REPEAT = re.compile(r"[*+]|\{\d*,\}")


class MuteError(ValueError):
    """A mute that cannot be accepted; ``problems`` holds one ``path: what is wrong`` each."""

    def __init__(self, problems: list[str]) -> None:
        self.problems = problems
        super().__init__("; ".join(problems))


@dataclass(frozen=True, slots=True, kw_only=True)
class Mute:
    """Series selected by ``match`` are muted for steps starting in ``[start, end)``."""

    id: str
    match: Match
    start: float  # epoch seconds (data time)
    end: float
    learn: bool = False  # false: muted steps teach no model (a planned outage is not learned)
    comment: str = ""
    created_by: str = ""
    origin: str = "api"  # "config" (from the YAML file, not saved in snapshots) or "api"

    def selects(self, metric: str, labels: Mapping[str, str]) -> bool:
        return self.match.matches(metric, labels)

    def to_json(self) -> dict[str, Any]:
        """Plain JSON-able form (the same keys :func:`parse_mute` reads, plus ``origin``)."""
        labels: dict[str, Any] = {}
        for name, m in self.match.labels:
            if m.regex is not None:
                labels[name] = {"not_regex" if m.negate else "regex": m.regex}
            elif m.negate:
                labels[name] = {"not": m.glob}
            else:
                labels[name] = m.glob
        return {"id": self.id, "match": {"metric": self.match.metric, "labels": labels},
                "start": self.start, "end": self.end, "learn": self.learn, "comment": self.comment,
                "created_by": self.created_by, "origin": self.origin}


def _time(raw: object, path: str, problems: list[str]) -> float | None:
    """Epoch seconds from a number or an RFC 3339 string with a UTC offset."""
    if isinstance(raw, bool):
        raw = None
    if isinstance(raw, datetime):  # YAML reads an unquoted timestamp as a datetime
        if raw.tzinfo is None:
            problems.append(f"{path}: give a UTC offset (e.g. 2024-05-01T22:00:00Z), got {raw}")
            return None
        raw = raw.timestamp()
    if isinstance(raw, int | float):
        value = float(raw)
    elif isinstance(raw, str) and len(raw) <= 64:
        try:
            dt = datetime.fromisoformat(raw)
        except ValueError:
            problems.append(f"{path}: not an RFC 3339 time, got {raw!r}")
            return None
        if dt.tzinfo is None:
            problems.append(f"{path}: give a UTC offset (e.g. 2024-05-01T22:00:00Z), got {raw!r}")
            return None
        value = dt.timestamp()
    else:
        problems.append(f"{path}: expected epoch seconds or an RFC 3339 time, got {str(raw)[:80]!r}")
        return None
    if not (math.isfinite(value) and 0 <= value <= 253402300799):
        problems.append(f"{path}: time out of range (years 1970 to 9999), got {raw!r}")
        return None
    return value


def _text(raw: Mapping, name: str, path: str, problems: list[str], limit: int) -> str:
    value = raw.get(name, "")
    if not isinstance(value, str):
        problems.append(f"{path}.{name}: expected a string, got {type(value).__name__}")
        return ""
    if len(value) > limit:
        problems.append(f"{path}.{name}: at most {limit} characters, got {len(value)}")
        return ""
    return value


def _check_match(match: Match, path: str, problems: list[str]) -> None:
    """Bound what a mute's matcher may cost: short patterns, few labels, no slow regex constructs."""
    if len(match.labels) > MAX_LABELS:
        problems.append(f"{path}.labels: at most {MAX_LABELS} label matchers, got {len(match.labels)}")
    if len(match.metric) > MAX_PATTERN:
        problems.append(f"{path}.metric: at most {MAX_PATTERN} characters")
    for name, m in match.labels:
        pattern = m.regex if m.regex is not None else (m.glob or "")
        if len(pattern) > MAX_PATTERN or len(name) > MAX_PATTERN:
            problems.append(f"{path}.labels.{name[:50]}: at most {MAX_PATTERN} characters")
        elif m.regex is not None and _UNSAFE.search(m.regex):
            problems.append(f"{path}.labels.{name}: regular expression not allowed in a mute "
                            "(no back-references, look-arounds or quantified groups)")
        elif m.regex is not None and len(_REPEAT.findall(m.regex)) > MAX_REPEATS:
            problems.append(f"{path}.labels.{name}: at most {MAX_REPEATS} unbounded repetitions "
                            "(*, +, {n,}) in a mute's regular expression")
    if match.metric == "*" and not match.labels:
        problems.append(f"{path}: selects every series; give a metric or at least one label")


def parse_mute(raw: object, path: str = "mute", *, origin: str = "api",
               default_id: str | None = None) -> Mute:
    """Validate one mute (from the YAML ``mutes`` list or an API body); raises MuteError.

    >>> m = parse_mute({"match": {"labels": {"service": "checkout"}},
    ...                 "start": "2024-05-01T22:00:00Z", "end": 1714608000}, default_id="m1")
    >>> (m.id, m.start, m.end, m.learn)
    ('m1', 1714600800.0, 1714608000.0, False)
    """
    from streamdet.config import _parse_match, _Section  # the rules' matcher language

    problems: list[str] = []
    if not isinstance(raw, Mapping):
        raise MuteError([f"{path}: expected a mapping, got {type(raw).__name__}"])
    known = {"id", "match", "start", "end", "learn", "comment", "created_by", "origin"}
    for key in sorted(set(raw) - known, key=str):
        problems.append(f"{path}.{str(key)[:50]}: unknown key; valid keys here: "
                        + ", ".join(sorted(known - {"origin"})))
    mid = raw.get("id", default_id)
    if not isinstance(mid, str) or not _ID.fullmatch(mid) or len(mid) > MAX_ID:
        problems.append(f"{path}.id: expected up to {MAX_ID} letters, digits or _.:- , got "
                        f"{str(mid)[:80]!r}")
        mid = ""
    match = Match()
    if "match" not in raw:
        problems.append(f"{path}.match: required (metric and/or labels)")
    else:
        before = len(problems)
        match = _parse_match(_Section(raw["match"], f"{path}.match", problems))
        if len(problems) == before:
            _check_match(match, f"{path}.match", problems)
    start = _time(raw.get("start"), f"{path}.start", problems)
    end = _time(raw.get("end"), f"{path}.end", problems)
    if start is not None and end is not None and not end > start:
        problems.append(f"{path}.end: must be after start")
    learn = raw.get("learn", False)
    if not isinstance(learn, bool):
        problems.append(f"{path}.learn: expected true or false, got {learn!r}")
    comment = _text(raw, "comment", path, problems, MAX_TEXT)
    created_by = _text(raw, "created_by", path, problems, MAX_TEXT)
    if problems:
        raise MuteError(problems)
    assert start is not None and end is not None
    return Mute(id=mid, match=match, start=start, end=end, learn=learn, comment=comment,
                created_by=created_by, origin=origin)


def parse_mutes(raw: object, path: str = "mutes") -> tuple[tuple[Mute, ...], list[str]]:
    """The YAML ``mutes`` list: (mutes, problems). Entries without an id get ``config-<n>``."""
    if raw is None:
        return (), []
    if not isinstance(raw, list):
        return (), [f"{path}: expected a list of mutes, got {type(raw).__name__}"]
    out: list[Mute] = []
    problems: list[str] = []
    if len(raw) > MAX_MUTES:
        problems.append(f"{path}: at most {MAX_MUTES} mutes, got {len(raw)}")
    for i, item in enumerate(raw[:MAX_MUTES]):
        try:
            out.append(parse_mute(item, f"{path}[{i}]", origin="config", default_id=f"config-{i}"))
        except MuteError as exc:
            problems.extend(exc.problems)
    ids = [m.id for m in out]
    for dup in sorted({x for x in ids if ids.count(x) > 1}):
        problems.append(f"{path}: id {dup!r} is used more than once")
    return tuple(out), problems


def mute_from_json(raw: Mapping[str, Any]) -> Mute:
    """Inverse of :meth:`Mute.to_json` (snapshots); raises MuteError on damage."""
    return parse_mute(raw, "snapshot mute", origin=str(raw.get("origin", "api")))


class Mutes:
    """The mutes one engine applies, by id. ``version`` changes with every change of the set."""

    def __init__(self, mutes: Iterable[Mute] = ()) -> None:
        self.entries: dict[str, Mute] = {}
        self.version = 0
        for m in mutes:
            self.entries[m.id] = m

    def __bool__(self) -> bool:
        return bool(self.entries)

    def __len__(self) -> int:
        return len(self.entries)

    def add(self, mute: Mute) -> None:
        """Add or replace (same id)."""
        if mute.id not in self.entries and len(self.entries) >= MAX_MUTES:
            raise MuteError([f"at most {MAX_MUTES} mutes"])
        self.entries[mute.id] = mute
        self.version += 1

    def remove(self, mute_id: str) -> bool:
        if self.entries.pop(mute_id, None) is None:
            return False
        self.version += 1
        return True

    def replace_api(self, mutes: Iterable[Mute]) -> None:
        """Keep the config's mutes; the API's become exactly ``mutes``."""
        kept = {k: m for k, m in self.entries.items() if m.origin == "config"}
        for m in mutes:
            kept.setdefault(m.id, m)
        if kept != self.entries:
            self.entries = kept
            self.version += 1

    def expire(self, before: float) -> list[str]:
        """Drop mutes that ended at or before ``before`` (data time); returns their ids."""
        gone = [k for k, m in self.entries.items() if m.end <= before]
        for k in gone:
            del self.entries[k]
        if gone:
            self.version += 1
        return gone

    def active_at(self, t: float) -> int:
        return sum(1 for m in self.entries.values() if m.start <= t < m.end)

    def api_entries(self) -> list[Mute]:
        return [m for m in self.entries.values() if m.origin == "api"]
