"""Multi-echelon supply-chain LPs for tests, demos and benchmarks.

Plants make products, ship them to warehouses, warehouses hold stock between
periods and ship on to customers. Every number is drawn from a seeded random
generator, so the same arguments always give the same model.

Columns (all >= 0):
    make[P2,widget,t3]          units made at a plant in a period
    ship[P2->W1,widget,t3]      units moved plant -> warehouse
    ship[W1->C17,widget,t3]     units moved warehouse -> customer
    stock[W1,widget,t3]         units held at a warehouse at the end of a period
    short[C17,widget,t3]        demand left unserved (penalized, keeps every model feasible)

Rows:
    cap[P2,t3]                  production hours <= plant capacity
    flow[P2,widget,t3]          made = shipped out of the plant
    bal[W1,widget,t3]           opening stock + inflow = outflow + closing stock
    thru[W1,t3]                 units handled by a warehouse <= its throughput
    space[W1,t3]                volume of closing stock <= storage space
    dem[C17,widget,t3]          delivered + shortfall = demand

Objective: minimize production + transport + holding + shortfall penalty.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from service.lp.model import MINIMIZE, LinearProgram

PRODUCT_NAMES = (
    "widget", "gadget", "sprocket", "bracket", "flange", "gasket",
    "valve", "hinge", "coupler", "spindle", "bearing", "nozzle",
)  # fmt: skip

CAPACITY_LOSS = 0.15  # share of a plant's hours or a lane's flow a disruption removes


@dataclass(frozen=True)
class Shape:
    plants: int
    warehouses: int
    customers: int
    products: int
    periods: int
    lanes_per_customer: int = 4

    @property
    def rows(self) -> int:
        p, w, c, k, t = self.plants, self.warehouses, self.customers, self.products, self.periods
        return t * (p + 2 * w) + k * t * (p + w + c)

    @property
    def columns(self) -> int:
        p, w, c, k, t = self.plants, self.warehouses, self.customers, self.products, self.periods
        d = min(self.lanes_per_customer, w)
        return k * t * (p + p * w + c * d + w + c)


@dataclass
class Cut:
    """One new constraint over existing columns: lower <= coefficients . x[columns] <= upper."""

    name: str
    columns: np.ndarray  # int64 column indices
    coefficients: np.ndarray  # float64, same length
    lower: float
    upper: float
    description: str  # what happened, in a planner's words

    def activity(self, x: np.ndarray) -> float:
        return float(self.coefficients @ np.asarray(x)[self.columns])

    def violation(self, x: np.ndarray) -> float:
        """How far x lies outside the new row's bounds (0 when it satisfies them)."""
        a = self.activity(x)
        return max(self.lower - a, a - self.upper, 0.0)


def _product_names(k: int) -> list[str]:
    names = list(PRODUCT_NAMES[:k])
    names += [f"part{i + 1}" for i in range(len(names), k)]
    return names


def generate(
    plants: int = 3,
    warehouses: int = 6,
    customers: int = 70,
    products: int = 4,
    periods: int = 6,
    seed: int = 0,
    lanes_per_customer: int = 4,
) -> LinearProgram:
    """A supply-chain LP of the given shape, deterministic from ``seed``.

    Each customer is served by its ``lanes_per_customer`` nearest warehouses;
    every plant can ship to every warehouse.
    """
    if min(plants, warehouses, customers, products, periods, lanes_per_customer) < 1:
        raise ValueError("every dimension must be at least 1")
    rng = np.random.default_rng(seed)
    P, W, C, K, T = plants, warehouses, customers, products, periods
    D = min(lanes_per_customer, W)
    prods = _product_names(K)

    # Geography: sites on a 100 x 100 map; lane costs grow with distance and weight.
    plant_xy = rng.uniform(0, 100, (P, 2))
    wh_xy = rng.uniform(0, 100, (W, 2))
    cust_xy = rng.uniform(0, 100, (C, 2))
    dist_pw = np.linalg.norm(plant_xy[:, None, :] - wh_xy[None, :, :], axis=2)  # P x W
    dist_wc = np.linalg.norm(wh_xy[:, None, :] - cust_xy[None, :, :], axis=2)  # W x C
    nearest = np.argsort(dist_wc, axis=0)[:D].T  # C x D warehouse indices

    weight = rng.uniform(0.5, 2.0, K)
    volume = rng.uniform(0.5, 1.5, K)
    unit_cost = rng.uniform(8.0, 20.0, K)
    hours = rng.uniform(0.8, 1.5, (P, K))  # plant hours per unit

    season = 1.0 + 0.3 * np.sin(2 * np.pi * (np.arange(T) / max(T, 1)) + rng.uniform(0, 2 * np.pi))
    base = rng.uniform(5.0, 50.0, (C, K))
    demand = np.round(base[:, :, None] * season[None, None, :] * rng.uniform(0.85, 1.15, (C, K, T)), 1)

    # Capacity a little under average need, so peaks force pre-building, stock and some shortfall.
    hours_needed = (demand.sum(axis=0) * hours.mean(axis=0)[:, None]).sum(axis=0)  # per period
    share = rng.dirichlet(np.full(P, 4.0))
    capacity = np.round(0.97 * hours_needed.mean() * share[:, None] * rng.uniform(0.9, 1.1, (P, T)), 1)
    per_period_units = demand.sum(axis=(0, 1)).mean()
    throughput = np.round(per_period_units / W * rng.uniform(1.0, 1.8, (W, T)), 1)
    storage = np.round(per_period_units * volume.mean() / W * rng.uniform(0.3, 0.8, W), 1)
    opening = np.round(rng.uniform(0.0, 0.1, (W, K)) * storage[:, None] / volume[None, :], 1)

    make_cost = (
        unit_cost[None, :, None] * rng.uniform(0.8, 1.2, (P, K, 1)) * rng.uniform(0.97, 1.03, (P, K, T))
    )
    pw_cost = (0.5 + 0.02 * dist_pw[:, :, None, None] * weight[None, None, :, None]) * np.ones((1, 1, 1, T))
    wc_dist = dist_wc[nearest, np.arange(C)[:, None]]  # C x D
    wc_cost = (1.0 + 0.05 * wc_dist[:, :, None, None] * weight[None, None, :, None]) * np.ones((1, 1, 1, T))
    hold_cost = 0.03 * unit_cost[None, :, None] * np.ones((W, 1, T))
    short_cost = (3.0 * unit_cost + 25.0)[None, :, None] * np.ones((C, 1, T))

    # Column blocks, laid out in this order; each index array has the block's natural shape.
    sizes = {
        "make": P * K * T,
        "pw": P * W * K * T,
        "wc": C * D * K * T,
        "stock": W * K * T,
        "short": C * K * T,
    }
    starts = np.cumsum([0] + list(sizes.values()))
    make_ix = (starts[0] + np.arange(sizes["make"])).reshape(P, K, T)
    pw_ix = (starts[1] + np.arange(sizes["pw"])).reshape(P, W, K, T)
    wc_ix = (starts[2] + np.arange(sizes["wc"])).reshape(C, D, K, T)
    stock_ix = (starts[3] + np.arange(sizes["stock"])).reshape(W, K, T)
    short_ix = (starts[4] + np.arange(sizes["short"])).reshape(C, K, T)
    n = int(starts[-1])
    cost = np.concatenate(
        [make_cost.ravel(), pw_cost.ravel(), wc_cost.ravel(), hold_cost.ravel(), short_cost.ravel()]
    )

    rows_i: list[np.ndarray] = []
    cols_j: list[np.ndarray] = []
    vals: list[np.ndarray] = []
    row_lower: list[np.ndarray] = []
    row_upper: list[np.ndarray] = []
    row_names: list[str] = []
    next_row = 0

    def block(count: int, lower: np.ndarray, upper: np.ndarray, names: list[str]) -> int:
        nonlocal next_row
        first = next_row
        next_row += count
        row_lower.append(np.broadcast_to(np.asarray(lower, float), (count,)).ravel())
        row_upper.append(np.broadcast_to(np.asarray(upper, float), (count,)).ravel())
        row_names.extend(names)
        return first

    def entries(rows: np.ndarray, cols: np.ndarray, coef: np.ndarray | float) -> None:
        rows, cols = np.broadcast_arrays(rows, cols)
        rows_i.append(rows.ravel())
        cols_j.append(cols.ravel())
        vals.append(np.broadcast_to(np.asarray(coef, float), rows.shape).ravel())

    periods_t = [f"t{t + 1}" for t in range(T)]
    pl = [f"P{p + 1}" for p in range(P)]
    wh = [f"W{w + 1}" for w in range(W)]
    cu = [f"C{c + 1}" for c in range(C)]

    # cap[p,t]: sum_k hours[p,k] make[p,k,t] <= capacity[p,t]
    r0 = block(P * T, -np.inf, capacity.ravel(), [f"cap[{p},{t}]" for p in pl for t in periods_t])
    cap_row = r0 + np.arange(P * T).reshape(P, T)
    entries(cap_row[:, None, :], make_ix, hours[:, :, None])

    # flow[p,k,t]: make - sum_w ship[p->w] = 0
    r0 = block(P * K * T, 0.0, 0.0, [f"flow[{p},{k},{t}]" for p in pl for k in prods for t in periods_t])
    flow_row = r0 + np.arange(P * K * T).reshape(P, K, T)
    entries(flow_row, make_ix, 1.0)
    entries(flow_row[:, None, :, :], pw_ix, -1.0)

    # bal[w,k,t]: stock[t-1] + sum_p ship[p->w] - sum_c ship[w->c] - stock[t] = 0
    # (the opening stock moves to the right-hand side of t1)
    bal_rhs = np.zeros((W, K, T))
    bal_rhs[:, :, 0] = -opening
    r0 = block(
        W * K * T,
        bal_rhs.ravel(),
        bal_rhs.ravel(),
        [f"bal[{w},{k},{t}]" for w in wh for k in prods for t in periods_t],
    )
    bal_row = r0 + np.arange(W * K * T).reshape(W, K, T)
    entries(bal_row[None, :, :, :], pw_ix, 1.0)
    entries(bal_row[nearest], wc_ix, -1.0)  # bal_row[nearest] is C x D x K x T
    entries(bal_row, stock_ix, -1.0)
    entries(bal_row[:, :, 1:], stock_ix[:, :, :-1], 1.0)

    # thru[w,t]: inbound units <= throughput[w,t]
    r0 = block(W * T, -np.inf, throughput.ravel(), [f"thru[{w},{t}]" for w in wh for t in periods_t])
    thru_row = r0 + np.arange(W * T).reshape(W, T)
    entries(thru_row[None, :, None, :], pw_ix, 1.0)

    # space[w,t]: sum_k volume[k] stock[w,k,t] <= storage[w]
    r0 = block(W * T, -np.inf, np.repeat(storage, T), [f"space[{w},{t}]" for w in wh for t in periods_t])
    space_row = r0 + np.arange(W * T).reshape(W, T)
    entries(space_row[:, None, :], stock_ix, volume[None, :, None])

    # dem[c,k,t]: sum_d ship[w_d->c] + short = demand
    r0 = block(
        C * K * T,
        demand.ravel(),
        demand.ravel(),
        [f"dem[{c},{k},{t}]" for c in cu for k in prods for t in periods_t],
    )
    dem_row = r0 + np.arange(C * K * T).reshape(C, K, T)
    entries(dem_row[:, None, :, :], wc_ix, 1.0)
    entries(dem_row, short_ix, 1.0)

    m = next_row
    A = sp.csc_matrix((np.concatenate(vals), (np.concatenate(rows_i), np.concatenate(cols_j))), shape=(m, n))

    col_names = [f"make[{p},{k},{t}]" for p in pl for k in prods for t in periods_t]
    col_names += [f"ship[{p}->{w},{k},{t}]" for p in pl for w in wh for k in prods for t in periods_t]
    col_names += [
        f"ship[{wh[nearest[c, d]]}->{cu[c]},{k},{t}]"
        for c in range(C)
        for d in range(D)
        for k in prods
        for t in periods_t
    ]
    col_names += [f"stock[{w},{k},{t}]" for w in wh for k in prods for t in periods_t]
    col_names += [f"short[{c},{k},{t}]" for c in cu for k in prods for t in periods_t]

    return LinearProgram(
        A=A,
        c=np.round(cost, 3),
        col_lower=np.zeros(n),
        col_upper=np.full(n, np.inf),
        row_lower=np.concatenate(row_lower),
        row_upper=np.concatenate(row_upper),
        sense=MINIMIZE,
        col_names=col_names,
        row_names=row_names,
        name=f"supply_chain_p{P}_w{W}_c{C}_k{K}_t{T}_s{seed}",
    )


def shape_for_rows(rows_target: int) -> Shape:
    """A plausible network shape whose row count lands near ``rows_target``.

    Products and periods stay fixed (4 x 6); warehouses grow with the square
    root of the size, plants with warehouses, and customers take up the rest.
    Four lanes per customer give about five columns per row.
    """
    if rows_target < 60:
        raise ValueError("rows_target must be at least 60")
    K, T = 4, 6
    W = max(2, round(np.sqrt(rows_target) / 8))
    P = max(2, W // 2)
    C = max(1, round((rows_target - T * (P + 2 * W)) / (K * T) - P - W))
    return Shape(P, W, C, K, T)


def sized(rows_target: int, seed: int = 0) -> LinearProgram:
    """A supply-chain LP with about ``rows_target`` rows (10,000 rows gives about 49,000 columns)."""
    s = shape_for_rows(rows_target)
    return generate(s.plants, s.warehouses, s.customers, s.products, s.periods, seed, s.lanes_per_customer)


_CAP = re.compile(r"^cap\[(P\d+),(t\d+)\]$")
_PW = re.compile(r"^ship\[(P\d+)->(W\d+),[^,\]]+,(t\d+)\]$")


def cutting_capacity_row(lp: LinearProgram, x: np.ndarray, seed: int = 0, kind: str | None = None) -> Cut:
    """A new constraint that the plan ``x`` violates, phrased as a disruption.

    kind "outage": a plant loses 15% of the hours it uses in one period
    (``outage[P2,t3]``, a copy of ``cap[P2,t3]`` with a lower limit).
    kind "lane": a carrier caps a plant -> warehouse lane in one period at 85%
    of its planned flow (``lanecap[P1->W3,t2]``, over all products).
    Candidates are the busiest plants or lanes; ``seed`` picks among the top few.
    Without ``kind`` the seed also picks the kind.
    """
    x = np.asarray(x, dtype=float)
    rng = np.random.default_rng(seed)
    if kind is None:
        kind = ("outage", "lane")[int(rng.integers(2))]
    if kind == "outage":
        cuts = _outage_cuts(lp, x)
    elif kind == "lane":
        cuts = _lane_cuts(lp, x)
    else:
        raise ValueError(f"unknown cut kind {kind!r}")
    if not cuts:
        raise ValueError(f"the plan uses no {kind} capacity that could be cut")
    top = cuts[: min(5, len(cuts))]
    return top[int(rng.integers(len(top)))]


def cutting_rows(lp: LinearProgram, x: np.ndarray, count: int, seed: int = 0) -> list[Cut]:
    """``count`` distinct cuts, each violated by ``x`` (mixed outages and lane limits)."""
    rng = np.random.default_rng(seed)
    pool = _outage_cuts(lp, np.asarray(x, float))[:count] + _lane_cuts(lp, np.asarray(x, float))[:count]
    if len(pool) < count:
        raise ValueError(f"only {len(pool)} cuts available, {count} asked for")
    pick = rng.choice(len(pool), size=count, replace=False)
    return [pool[i] for i in sorted(pick)]


def _outage_cuts(lp: LinearProgram, x: np.ndarray) -> list[Cut]:
    """One candidate per used cap row, busiest first."""
    A_rows = lp.A.tocsr()
    out = []
    for i, name in enumerate(lp.row_names):
        match = _CAP.match(name)
        if not match:
            continue
        lo, hi = A_rows.indptr[i], A_rows.indptr[i + 1]
        cols, coefs = A_rows.indices[lo:hi].astype(np.int64), A_rows.data[lo:hi].copy()
        used = float(coefs @ x[cols])
        if used <= 1e-6 * max(1.0, abs(lp.row_upper[i])):
            continue
        plant, period = match.groups()
        limit = round((1.0 - CAPACITY_LOSS) * used, 6)
        out.append(
            (
                used,
                Cut(
                    name=f"outage[{plant},{period}]",
                    columns=cols,
                    coefficients=coefs,
                    lower=-np.inf,
                    upper=limit,
                    description=(
                        f"plant {plant} loses {CAPACITY_LOSS:.0%} of its hours in {period}: "
                        f"{used:.1f} planned, {limit:.1f} available"
                    ),
                ),
            )
        )
    out.sort(key=lambda item: -item[0])
    return [cut for _, cut in out]


def _lane_cuts(lp: LinearProgram, x: np.ndarray) -> list[Cut]:
    """One candidate per used plant -> warehouse lane and period, busiest first."""
    groups: dict[tuple[str, str, str], list[int]] = {}
    for j, name in enumerate(lp.col_names):
        match = _PW.match(name)
        if match:
            groups.setdefault(match.groups(), []).append(j)
    out = []
    for (plant, wh, period), cols in groups.items():
        idx = np.asarray(cols, dtype=np.int64)
        flow = float(x[idx].sum())
        if flow <= 1e-6:
            continue
        limit = round((1.0 - CAPACITY_LOSS) * flow, 6)
        out.append(
            (
                flow,
                Cut(
                    name=f"lanecap[{plant}->{wh},{period}]",
                    columns=idx,
                    coefficients=np.ones(idx.size),
                    lower=-np.inf,
                    upper=limit,
                    description=(
                        f"carrier caps lane {plant}->{wh} in {period} at {limit:.1f} units "
                        f"({flow:.1f} planned)"
                    ),
                ),
            )
        )
    out.sort(key=lambda item: -item[0])
    return [cut for _, cut in out]


def with_rows(lp: LinearProgram, cuts: list[Cut]) -> LinearProgram:
    """A new LinearProgram: ``lp`` with the cuts appended as rows (``lp`` is not changed)."""
    if not cuts:
        return lp.copy()
    rows = np.concatenate([np.full(cut.columns.size, i) for i, cut in enumerate(cuts)])
    cols = np.concatenate([cut.columns for cut in cuts])
    data = np.concatenate([cut.coefficients for cut in cuts])
    extra = sp.csc_matrix((data, (rows, cols)), shape=(len(cuts), lp.n))
    return LinearProgram(
        A=sp.vstack([lp.A, extra], format="csc"),
        c=lp.c.copy(),
        col_lower=lp.col_lower.copy(),
        col_upper=lp.col_upper.copy(),
        row_lower=np.concatenate([lp.row_lower, [cut.lower for cut in cuts]]),
        row_upper=np.concatenate([lp.row_upper, [cut.upper for cut in cuts]]),
        sense=lp.sense,
        offset=lp.offset,
        col_names=list(lp.col_names),
        row_names=list(lp.row_names) + [cut.name for cut in cuts],
        name=lp.name,
    )
