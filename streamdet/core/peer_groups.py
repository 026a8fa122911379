"""Peer groups in the engine: which series are members of which group, and the second judge.

A rule with ``peers`` puts each of its series in the group of its ``group_by`` label values.
Closed steps of members are collected as they close (a member's step may close in a later
wave than another's) and a group's step is judged once it is complete: when event time has
passed its end plus the rule's lateness, every member's step has closed. Each member step then
gets a modified z-score against the group (or, for ``method: dbscan``, the member's recent shape
is clustered) and goes through the same evidence and open/clear/re-arm code as temporal
breaches (:class:`~streamdet.core.evidence.EvidenceWindow`, :class:`~streamdet.core.confirm.
BreachState`: second instances over the same rows). Only built when a rule has ``peers``.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, ClassVar

import numpy as np
from scipy.special import stdtr

from streamdet.config import PeerParams, Rule
from streamdet.core.columns import ColumnSpec, ColumnState
from streamdet.core.confirm import BreachState
from streamdet.core.evidence import EvidenceWindow, fisher_surprise
from streamdet.core.peers import modified_z, shape_outliers
from streamdet.core.points import Labels, series_key
from streamdet.core.steps import ClosedSteps
from streamdet.events import OUTLIER_CLOSED, OUTLIER_OPENED, OutlierEvent, event_id

if TYPE_CHECKING:
    from streamdet.core.engine import Engine

T_DF_PER_MEMBER = 0.44  # degrees of freedom of the t law that calibrates M, per member
MIN_OUTSIDE_STEPS = 2  # outside steps (|M| > threshold) in the evidence window that open an outlier


def group_key(rule: str, labels: Labels) -> str:
    """Key of a group: the rule's name with the ``group_by`` labels, e.g. ``web{service="api"}``.

    >>> group_key("web", (("service", "api"),))
    'web{service="api"}'
    """
    return series_key(rule, labels)


class _OptionalState:
    """A part that only exists when some rule has ``peers``: a snapshot taken without peer
    groups restores with this part empty instead of failing."""

    def load(self, arrays: dict[str, np.ndarray], n: int) -> None:
        first = next(iter(self.columns()))  # type: ignore[attr-defined]
        if f"{self.prefix}.{first}" not in arrays:  # type: ignore[attr-defined]
            self.grow(max(n, 1))  # type: ignore[attr-defined]
            return
        super().load(arrays, n)  # type: ignore[misc]


class PeerBreaches(_OptionalState, BreachState):
    prefix = "peers.confirm"


class PeerEvidence(_OptionalState, EvidenceWindow):
    prefix = "peers.evidence"


class PeerState(_OptionalState, ColumnState):
    """Per row: group id (derived from labels, not saved), whether the row is a group total,
    and for DBSCAN rules a ring of the last ``window`` step values; plus the member steps
    closed but not yet judged (their group's step is not complete)."""

    prefix = "peers"
    BASE: ClassVar[ColumnSpec] = {
        "gid": ("i8", (), -1),  # -1: not yet looked up; -2: in no group
        "derived": ("i1", (), 0),  # 1: a group-total series (never a member)
    }

    def __init__(self, capacity: int, window: int) -> None:
        self.window = window
        self.pending = (np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0))
        super().__init__(capacity)

    def columns(self) -> ColumnSpec:
        if not self.window:
            return self.BASE
        return {**self.BASE, "ring": ("f8", (self.window,), np.nan),
                "ring_k": ("i8", (self.window,), -1)}

    def reset(self, rows: np.ndarray) -> None:
        super().reset(rows)
        pr, pk, py = self.pending
        keep = ~np.isin(pr, rows)
        self.pending = (pr[keep], pk[keep], py[keep])

    def state(self, n: int) -> dict[str, np.ndarray]:
        return {k: v.copy() for k, v in self.state_views(n).items()}

    def state_views(self, n: int) -> dict[str, np.ndarray]:
        out = super().state_views(n)
        out["peers.gid"] = np.full(n, -1, np.int64)  # group ids are rebuilt from labels
        for name, arr in zip(("row", "k", "value"), self.pending, strict=True):
            out[f"peers.pending.{name}"] = arr
        return out

    def load(self, arrays: dict[str, np.ndarray], n: int) -> None:
        super().load(arrays, n)
        if "peers.pending.row" in arrays:
            self.pending = (arrays["peers.pending.row"].astype(np.int64),
                            arrays["peers.pending.k"].astype(np.int64),
                            arrays["peers.pending.value"].astype(np.float64))


class PeerJudge:
    """Groups, pending member steps and the per-step judging of every peer group of an engine."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        rules = engine.config.rules
        cap = engine.table.capacity
        self.params: list[PeerParams | None] = [r.peers for r in rules]
        self.rule_has = np.array([p is not None for p in self.params])
        self.rule_dbscan = np.array([p is not None and p.method == "dbscan" for p in self.params])
        window = max((p.window for p in self.params if p is not None and p.method == "dbscan"), default=0)
        self.state = PeerState(cap, window)
        self.breaches = PeerBreaches(cap)
        self.evidence = PeerEvidence(cap)
        self.parts: list[ColumnState] = [self.state, self.breaches, self.evidence]
        self.rule_min = np.array([p.min_members if p else 0 for p in self.params], np.int64)
        self.rule_thr = np.array([p.threshold if p else np.inf for p in self.params])
        # a step is unusual (it keeps an outlier open) one unit inside the cut-off, as for bands
        self.rule_unusual = np.maximum(self.rule_thr - 1.0, 0.5 * self.rule_thr)
        self.rule_need = np.array([_need(r) for r in rules])
        self.rule_window = np.array([r.confirm_steps for r in rules], np.int64)
        self.rule_clear = np.array([r.clear_steps for r in rules], np.int64)
        self.groups: dict[tuple[int, Labels], int] = {}
        self.group_info: list[tuple[int, Labels, str]] = []  # gid -> (rule, labels, key)

    # ------------------------------------------------------------ membership

    def _gids(self, rows: np.ndarray) -> np.ndarray:
        """Group id per row (-2: the row lacks a ``group_by`` label), looked up once per row."""
        st = self.state
        gid = st.gid[rows]
        todo = np.flatnonzero(gid == -1)
        if todo.shape[0]:
            tab = self.engine.table
            for row in np.unique(rows[todo]).tolist():
                rule_i = int(tab.rule[row])
                params = self.params[rule_i]
                labels = dict(tab.meta[row][1]) if tab.meta[row] else {}
                if params is None or any(g not in labels for g in params.group_by):
                    st.gid[row] = -2
                    continue
                glabels = tuple((g, labels[g]) for g in params.group_by)
                key = (rule_i, glabels)
                g = self.groups.get(key)
                if g is None:
                    g = len(self.group_info)
                    self.groups[key] = g
                    self.group_info.append((rule_i, glabels, group_key(self.engine.config.rules[rule_i].name,
                                                                       glabels)))
                st.gid[row] = g
            gid = st.gid[rows]
        return gid

    def group_keys(self) -> set[str]:
        """Keys of the groups with a live member (for the daemon's split-group check)."""
        tab = self.engine.table
        n = tab.n
        g = self.state.gid[:n]
        live = (tab.rule[:n] >= 0) & (g >= 0)
        return {self.group_info[i][2] for i in np.unique(g[live]).tolist()}

    # ------------------------------------------------------------ collecting and judging

    def collect(self, closed: ClosedSteps) -> None:
        """Keep the closed steps of members until their group's step is complete."""
        eng = self.engine
        rule = eng.table.rule[closed.rows]
        m = self.rule_has[rule] & (self.state.derived[closed.rows] == 0) & np.isfinite(closed.value)
        if not m.any():
            return
        rows, k, y = closed.rows[m], closed.k[m], closed.value[m]
        pr, pk, py = self.state.pending
        self.state.pending = (np.concatenate([pr, rows]), np.concatenate([pk, k]), np.concatenate([py, y]))

    def judge(self, clock: float) -> list:
        """Judge every group step that is complete at ``clock``; returns outlier events."""
        pr, pk, py = self.state.pending
        if pr.shape[0] == 0:
            return []
        tab = self.engine.table
        live = tab.rule[pr] >= 0
        ready = live & ((pk + 1) * tab.step[pr] <= self._complete_until(pr, live))
        if not ready.any():
            self.state.pending = (pr[live], pk[live], py[live])
            return []
        keep = live & ~ready
        self.state.pending = (pr[keep], pk[keep], py[keep])
        rows, k, y = pr[ready], pk[ready], py[ready]
        gid = self._gids(rows)
        m = gid >= 0
        rows, k, y, gid = rows[m], k[m], y[m], gid[m]
        events: list = []
        for kk in np.unique(k).tolist():
            at = k == kk
            events.extend(self._judge_step(rows[at], kk, y[at], gid[at]))
        return events

    def _complete_until(self, pending_rows: np.ndarray, live: np.ndarray) -> np.ndarray:
        """Per pending row: its group's steps ending at or before this are closed for every
        member (the earliest of the members' close limits: each series closes its steps by its
        own clock, or by the partition's clock minus grace). A group is judged only when
        complete, so what it sees does not depend on batching; a member that went quiet holds
        its group back for at most ``grace``."""
        pg = np.full(pending_rows.shape[0], -1, np.int64)
        pg[live] = self._gids(pending_rows[live])
        tab = self.engine.table
        n = tab.n
        rule = tab.rule[:n]
        members = np.flatnonzero(rule >= 0)
        members = members[self.rule_has[rule[members]] & (self.state.derived[members] == 0)]
        gid = self._gids(members)
        m = gid >= 0
        limit = np.full(len(self.group_info), -np.inf)
        if m.any():
            order = np.argsort(gid[m], kind="stable")
            g = gid[m][order]
            lim = self.engine._close_limit(members[m][order])
            starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
            limit = np.full(len(self.group_info), np.inf)
            limit[g[starts]] = np.minimum.reduceat(lim, starts)
        out = np.full(pending_rows.shape[0], -np.inf)
        has = pg >= 0
        out[has] = limit[pg[has]]
        # a pending row outside every group is dropped by the caller once ready: make it ready
        out[live & ~has] = np.inf
        return out

    def _judge_step(self, rows: np.ndarray, k: int, y: np.ndarray, gid: np.ndarray) -> list:
        """One step of every group with members in it (members are unique rows here)."""
        eng = self.engine
        tab = eng.table
        rule = tab.rule[rows]
        step = tab.step[rows]
        start = k * step
        ugid, seg = np.unique(gid, return_inverse=True)
        count = np.bincount(seg)
        enough = count[seg] >= self.rule_min[rule]
        first = np.unique(seg, return_index=True)[1]
        eng.counters["peer_groups_judged"] += int((count >= self.rule_min[rule[first]]).sum())
        eng.counters["peer_members_judged"] += int(enough.sum())
        out: list = []
        dbs = self.rule_dbscan[rule]
        if dbs.any():  # the ring holds the last `window` judged steps (written in step order)
            slot = k % self.state.window
            self.state.ring[rows[dbs], slot] = y[dbs]
            self.state.ring_k[rows[dbs], slot] = k
        mad_rows = enough & ~dbs
        if mad_rows.any():
            out += self._judge_mad(rows[mad_rows], k, y[mad_rows], seg[mad_rows], rule[mad_rows],
                                   start[mad_rows], step[mad_rows], ugid)
        if (enough & dbs).any():
            out += self._judge_dbscan(rows[enough & dbs], k, y[enough & dbs], seg[enough & dbs],
                                      rule[enough & dbs], start[enough & dbs], step[enough & dbs], ugid)
        out += self._totals(rows, k, y, seg, rule, ugid, enough)
        return out

    def _judge_mad(self, rows, k, y, seg, rule, start, step, ugid) -> list:
        _, local = np.unique(seg, return_inverse=True)
        s = modified_z(y, local, int(local.max()) + 1)
        z = s.z
        # tail probability per side: on normal members the modified z-score of an n-member
        # group follows roughly Student's t with 0.44 n degrees of freedom (fitted by our own
        # simulation, n = 5 .. 100, matching P(|M| > 3.5) and P(|M| > 5); a small df errs on
        # the side of fewer alarms): MAD from few members is itself noisy
        df = np.maximum(T_DF_PER_MEMBER * s.count[local], 1.0)
        p_up = stdtr(df, -z)
        p_lo = stdtr(df, z)
        judged = np.ones(rows.shape[0], dtype=bool)
        window = self.rule_window[rule]
        stat = self.evidence.add(rows, judged, p_up, p_lo, window)
        thr = self.rule_thr[rule]
        outside = np.stack([z > thr, z < -thr], axis=1)
        cut = self.rule_unusual[rule]
        unusual = np.stack([z > cut, z < -cut], axis=1)
        surprise = np.zeros(stat.shape)
        is_open = self.breaches.status[rows] != 0
        cand = outside.any(axis=1) | is_open
        if cand.any():
            i = np.flatnonzero(cand)
            surprise[i] = fisher_surprise(stat[i], window[i, None])
            # a new outlier needs MIN_OUTSIDE_STEPS outside steps on its side in the window: one
            # member step far out on an unluckily small MAD is not yet a member that drifted
            ring = self.evidence.ring[rows[i]].astype(np.float64)
            cut = _outside_cut(thr[i], df[i])[:, None]
            counts = np.stack([(ring >= cut).sum(axis=1), (ring <= -cut).sum(axis=1)], axis=1)
            enough = counts >= np.minimum(MIN_OUTSIDE_STEPS, window[i])[:, None]
            outside[i] &= enough
        surprise = np.where(outside | is_open[:, None], surprise, 0.0)
        figures = (s.median[local], s.mad[local], s.count[local], thr)
        return self._transitions(rows, k, y, z, rule, start, step, judged, surprise, unusual,
                                 figures, "mad", None, ugid, seg)

    def _judge_dbscan(self, rows, k, y, seg, rule, start, step, ugid) -> list:
        st = self.state
        W = st.window
        z = np.zeros(rows.shape[0])
        judged = np.zeros(rows.shape[0], dtype=bool)
        unusual = np.zeros((rows.shape[0], 2), dtype=bool)
        med = np.full(rows.shape[0], np.nan)
        mad = np.full(rows.shape[0], np.nan)
        members = np.zeros(rows.shape[0], np.int64)
        eps = np.full(rows.shape[0], np.nan)
        sizes: dict[int, tuple[int, ...]] = {}
        for g in np.unique(seg).tolist():
            idx = np.flatnonzero(seg == g)
            p = self.params[int(rule[idx[0]])]
            assert p is not None
            if k % p.every:
                continue
            ks = k - np.arange(p.window - 1, -1, -1)
            slots = ks % W
            r = rows[idx]
            full = (st.ring_k[r][:, slots] == ks[None, :]).all(axis=1)
            if int(full.sum()) < p.min_members:
                continue
            idx, r = idx[full], r[full]
            win = st.ring[r][:, slots]
            res = shape_outliers(win, p.min_samples)
            centred = win - np.median(win, axis=0, keepdims=True)
            side = np.where(centred.sum(axis=1) >= 0, 0, 1)
            judged[idx] = True
            unusual[idx, side] = res.outside
            z[idx] = np.where(side == 0, 1.0, -1.0) * np.nan_to_num(res.distance, nan=0.0)
            med[idx] = np.median(win[:, -1])
            mad[idx] = np.median(np.abs(win[:, -1] - med[idx[0]]))
            members[idx] = idx.shape[0]
            eps[idx] = res.eps
            sizes[g] = tuple(res.cluster_sizes)
        if not judged.any():
            return []
        need = self.rule_need[rule]
        surprise = np.where(unusual, need, 0.0)
        figures = (med, mad, members, eps)
        return self._transitions(rows, k, y, z, rule, start, step, judged, surprise, unusual, figures,
                                 "dbscan", sizes, ugid, seg)

    def _transitions(self, rows, k, y, z, rule, start, step, judged, surprise, unusual, figures,
                     method, sizes, ugid, seg) -> list:
        eng = self.engine
        b = self.breaches
        trans = b.step(rows, judged, surprise, self.rule_need[rule], unusual, z, start, step,
                       self.rule_clear[rule], eng.table.rearm[rows])
        changed = trans.opened | trans.closed
        if not changed.any():
            return []
        med, mad, members, thr = figures
        out = []
        for i in np.flatnonzero(changed).tolist():
            row = int(rows[i])
            g = int(ugid[seg[i]])
            if trans.opened[i]:
                b.since[row] = self._since(row, i, start, step, rule, method, members)
            out.append(self._event(row, i, g, method, trans.opened[i], start, step, y, z, med, mad,
                                   members, thr, (sizes or {}).get(int(seg[i]), ())))
        self.evidence.clear(rows[changed])
        eng.counters["outliers_opened"] += int(trans.opened.sum())
        eng.counters["outliers_closed"] += int(trans.closed.sum())
        return out

    def _since(self, row: int, i: int, start, step, rule, method: str, members) -> float:
        """Start of the oldest outside step on the outlier's side still in the evidence window
        (the opening step itself for DBSCAN, whose windows already look back)."""
        st = float(start[i])
        if method != "mad":
            return st
        stp = float(step[i] if np.ndim(step) else step)
        side = int(self.breaches.status[row])
        w = int(self.rule_window[rule[i]])
        ring = self.evidence.ring[row].astype(np.float64)
        pos = int(self.evidence.pos[row])
        cut = float(_outside_cut(self.rule_thr[rule[i]], max(T_DF_PER_MEMBER * float(members[i]), 1.0)))
        since = st
        for age in range(w):
            if side * ring[(pos - 1 - age) % w] >= cut:
                since = st - age * stp
        return since

    def _event(self, row, i, g, method, opened, start, step, y, z, med, mad, members, thr, sizes,
               reason="back among its peers"):
        eng = self.engine
        b = self.breaches
        tab = eng.table
        rule_i, glabels, gkey = self.group_info[g]
        rule = eng.config.rules[rule_i]
        metric, labels = tab.meta[row]
        st = float(start[i])
        stp = float(step[i] if np.ndim(step) else step)
        base = dict(series=tab.keys[row], metric=metric, labels=dict(labels), rule=rule.name, group=gkey,
                    group_labels=dict(glabels), method=method, step_start=st, step_end=st + stp,
                    observed=float(y[i]), median=float(_at(med, i)), mad=float(_at(mad, i)),
                    score=float(z[i]), threshold=float(_at(thr, i)), members=int(_at(members, i)),
                    started=float(b.since[row]), cluster_sizes=tuple(sizes))
        if opened:
            return OutlierEvent(type=OUTLIER_OPENED, direction="above" if b.status[row] > 0 else "below",
                                **base)
        worst = float(b.worst[row])
        return OutlierEvent(type=OUTLIER_CLOSED, direction="above" if worst >= 0 else "below",
                            duration=float(b.last_out[row] - b.since[row]), worst_score=worst,
                            reason=reason, opened_id=event_id(OUTLIER_OPENED, rule.name, tab.keys[row],
                                                              float(b.decided[row])), **base)

    def closed_idle(self, row: int) -> OutlierEvent | None:
        """Close an open outlier of a member that is being evicted (no step of its own: the
        last outside step is reported)."""
        b = self.breaches
        g = int(self.state.gid[row])
        if b.status[row] == 0:
            return None
        if g < 0:
            b.status[row] = 0
            return None
        tab = self.engine.table
        step = float(tab.step[row])
        nan = np.array([math.nan])
        method = "dbscan" if self.rule_dbscan[int(tab.rule[row])] else "mad"
        ev = self._event(row, 0, g, method, False, np.array([float(b.last_out[row]) - step]), step,
                         nan, nan, nan, nan, np.array([0]), nan, (), "member went quiet")
        b.status[row] = 0
        return ev

    # ------------------------------------------------------------ group totals

    def _totals(self, rows, k, y, seg, rule, ugid, enough) -> list:
        """``peers.total``: each group's sum or mean over its members at this step, judged by
        the temporal band as a series of its own (only steps with ``min_members`` members)."""
        eng = self.engine
        first = np.unique(seg, return_index=True)[1]
        kinds = [self.params[int(rule[i])] for i in first.tolist()]
        if not any(p is not None and p.total for p in kinds):
            return []
        n_seg = ugid.shape[0]
        ok = np.bincount(seg, weights=enough, minlength=n_seg) > 0
        total = np.bincount(seg, weights=y, minlength=n_seg)
        count = np.bincount(seg, minlength=n_seg)
        out_rows, out_v = [], []
        for j, p in zip(np.unique(seg).tolist(), kinds, strict=True):
            if p is None or not p.total or not ok[j]:
                continue
            row = self._total_row(int(ugid[j]), p.total)
            if row < 0:
                eng.counters["peer_totals_series_limit"] += 1
                continue
            out_rows.append(row)
            out_v.append(total[j] / count[j] if p.total == "mean" else total[j])
        if not out_rows:
            return []
        r = np.asarray(out_rows, np.int64)
        order = np.argsort(r)
        r = r[order]
        eng.table.last_seen[r] = np.maximum(eng.table.last_seen[r], (k + 1) * eng.table.step[r])
        eng.counters["peer_total_steps"] += r.shape[0]
        return eng._judge(r, np.full(r.shape[0], k, np.int64), np.asarray(out_v)[order])

    def _total_row(self, g: int, how: str) -> int:
        """Row of the group's total series (created on first use): metric ``<rule>:group_<how>``
        with the group's labels."""
        tab = self.engine.table
        rule_i, glabels, _ = self.group_info[g]
        metric = f"{self.engine.config.rules[rule_i].name}:group_{how}"
        key = series_key(metric, glabels)
        row = tab.index.get(key)
        if row is not None:
            return row
        created: list[int] = []
        row = tab.add(key, (metric, glabels), rule_i, created)
        if row < 0:
            return -1
        self.engine._on_new(np.asarray(created, np.int64))
        self.state.derived[row] = 1
        self.state.gid[row] = -2
        return row

    def stats(self) -> dict[str, int]:
        n = self.engine.table.n
        live = self.engine.table.live()
        return {"outliers_open": int((live & (self.breaches.status[:n] != 0)).sum())}


def _outside_cut(threshold, df):
    """``-ln p`` of a step exactly at the cut-off (what the evidence ring holds for it)."""
    return -np.log(stdtr(df, -np.asarray(threshold, dtype=np.float64)))


def _at(x, i):
    return x[i] if np.ndim(x) else x


def _need(rule: Rule) -> np.ndarray:
    """Surprise that opens an outlier, per side (inf: side not watched): evidence as rare as two
    outside steps in the window, ``(2 Q(threshold))**2``, split over the watched sides."""
    p = rule.peers
    if p is None:
        return np.array([np.inf, np.inf])
    q = 0.5 * math.erfc(p.threshold / math.sqrt(2.0))
    sides = 2 if rule.direction == "either" else 1
    need = -math.log10(max((2.0 * q) ** 2 / sides, 1e-300))
    return np.array([need if rule.direction in ("either", "rise") else np.inf,
                     need if rule.direction in ("either", "drop") else np.inf])
