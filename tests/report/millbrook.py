"""A small Millbrook-style network built in code and solved with gridflow's own solver.

An 8 x 6 street grid (120 m blocks) climbing to a hill in the north-east, fed from a
fixed-head source in the south-west through a transmission main, with a tank on the east
side. Three scenarios (average day, maximum day x1.8, peak hour x3). The solver's results are
turned into the contract's result layers (US or SI field names) with Point/LineString
geometries in a projected CRS, so report tests run on real solver heads.

Hydrant fire flow is estimated here only to have a plausible ``hydrants_fireflow`` layer: one
extra solve per hydrant with a test draw, then the flow at 20 psi residual by
Q_R = Q_F ((H_S - H_R) / (H_S - H_F))^0.54 (NFPA 291, flow-test formula).
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from gridflow.config.sections import CriteriaSection
from gridflow.hydraulics import solve
from gridflow.network import Network
from gridflow.report import ReportData, ScenarioData
from gridflow.units import M_HEAD_PER_PSI, OUTPUT, US_GALLON

CRS = "EPSG:26918"  # a projected CRS in metres
X0, Y0 = 580_000.0, 4_650_000.0
NX, NY, BLOCK = 8, 6, 120.0
GPM = US_GALLON / 60.0
SCENARIOS = {"avg_day": 1.0, "max_day": 1.8, "peak_hour": 3.0}
# flag thresholds as heads/velocities in SI (defaults of job.md, converted from psi and ft/s)
MIN_P, MAX_P = 35 * M_HEAD_PER_PSI, 80 * M_HEAD_PER_PSI
MAX_V, MAX_UHL = 5 * 0.3048, 10.0 / 1000.0


def build_network() -> tuple[Network, np.ndarray, dict]:
    """The network (SI), node coordinates [m], and pipe extras (rating psi)."""
    ii, jj = np.meshgrid(np.arange(NX), np.arange(NY), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    grid_ids = [f"J-{100 + k}" for k in range(NX * NY)]
    xy = np.column_stack([X0 + ii * BLOCK, Y0 + jj * BLOCK])
    hill = np.array([X0 + 6 * BLOCK, Y0 + 4.5 * BLOCK])
    d2 = ((xy - hill) ** 2).sum(axis=1)
    elev = 30.0 + 42.0 * np.exp(-d2 / (2 * 260.0**2))
    base = np.full(NX * NY, 0.9e-3)  # 0.9 L/s average day per node
    base[(ii + jj) % 5 == 0] = 2.0e-3
    # source and tank
    ids = grid_ids + ["SRC-1", "TNK-1"]
    xy = np.vstack([xy, [X0 - 400.0, Y0], [X0 + (NX - 1) * BLOCK + 250.0, Y0 + 2 * BLOCK]])
    elev = np.concatenate([elev, [40.0, 58.0]])
    fixed = np.concatenate([np.full(NX * NY, np.nan), [98.0, 93.0]])
    kind = np.concatenate([np.zeros(NX * NY, int), [1, 2]])
    demand = np.concatenate([base, [0.0, 0.0]])

    node = {(a, b): k for k, (a, b) in enumerate(zip(ii, jj))}
    fr, to, diam, rating = [], [], [], []
    for (a, b), k in node.items():
        if a + 1 < NX:
            fr.append(k), to.append(node[a + 1, b])
            diam.append(0.25 if b == 0 else 0.15 if b % 2 == 0 else 0.10)
        if b + 1 < NY:
            fr.append(k), to.append(node[a, b + 1])
            diam.append(0.20 if a == 0 else 0.10)
    n_grid = len(fr)
    rating = np.where(np.arange(n_grid) % 7 == 3, np.nan, 150.0)
    rating[np.arange(n_grid) % 11 == 5] = 100.0
    fr += [NX * NY, NX * NY + 1]
    to += [node[0, 0], node[NX - 1, 2]]
    diam += [0.40, 0.20]
    rating = np.concatenate([rating, [200.0, 150.0]])
    fr, to = np.array(fr), np.array(to)
    length = np.hypot(*(xy[fr] - xy[to]).T)
    link_ids = [f"M-{2000 + k}" for k in range(len(fr))]
    net = Network.from_arrays(
        node_id=ids, link_id=link_ids, from_idx=fr, to_idx=to, elevation_m=elev,
        demand_m3s=demand, fixed_head_m=fixed, node_kind=kind,
        zone=np.where(xy[:, 0] > X0 + 3.5 * BLOCK, "east", "west"),
        length_m=length, diameter_m=diam, roughness=np.where(np.array(diam) < 0.12, 100.0, 130.0))
    return net, xy, {"pressure_rating_psi": rating}


def _conv(q: str, system: str):
    suf, k = OUTPUT[system][q]
    return suf, k


def scenario_layers(net: Network, xy: np.ndarray, extra: dict, name: str, factor: float,
                    system: str = "US"):
    """Solve one scenario; return (nodes, pipes, result) in contract fields."""
    r = solve(net.replace(demand_m3s=net.demand_m3s * factor))
    def su(q):
        return _conv(q, system)

    sup = r.supplied.astype(int)
    fixed = net.is_fixed
    p = r.pressure_m
    nodes = gpd.GeoDataFrame({
        "node_id": net.node_id.astype(str),
        "kind": np.array(["junction", "source", "tank"])[net.node_kind],
        "fixed_head": fixed.astype(int),
        "zone": net.zone.astype(str),
        f"elevation_{su('elevation')[0]}": net.elevation_m * su("elevation")[1],
        f"required_demand_{su('demand')[0]}": r.required_demand_m3s * su("demand")[1],
        f"demand_{su('demand')[0]}": r.demand_m3s * su("demand")[1],
        f"head_{su('head')[0]}": r.head_m * su("head")[1],
        f"pressure_{su('pressure')[0]}": p * su("pressure")[1],
        "supplied": sup,
        "low_pressure": ((p < MIN_P) & ~fixed & r.supplied).astype(int),
        "high_pressure": ((p > MAX_P) & ~fixed).astype(int),
        "negative_pressure": ((p < 0) & ~fixed).astype(int),
    }, geometry=shapely.points(xy), crs=CRS)
    lines = shapely.linestrings(np.stack([xy[net.from_idx], xy[net.to_idx]], axis=1))
    rating_psi = extra["pressure_rating_psi"]
    pipes = gpd.GeoDataFrame({
        "pipe_id": net.link_id.astype(str),
        "kind": "pipe",
        "from_node": net.node_id[net.from_idx].astype(str),
        "to_node": net.node_id[net.to_idx].astype(str),
        f"length_{su('length')[0]}": net.length_m * su("length")[1],
        f"diameter_{su('diameter')[0]}": net.diameter_m * su("diameter")[1],
        "roughness": net.roughness,
        "roughness_model": "hazen-williams",
        "minor_loss_k": net.minor_k,
        "status": "open",
        f"flow_{su('flow')[0]}": r.flow_m3s * su("flow")[1],
        f"velocity_{su('velocity')[0]}": r.velocity_ms * su("velocity")[1],
        f"headloss_{su('headloss')[0]}": r.headloss_m * su("headloss")[1],
        f"unit_headloss_{su('unit_headloss')[0]}": r.unit_headloss * su("unit_headloss")[1],
        "high_velocity": (np.abs(r.velocity_ms) > MAX_V).astype(int),
        "high_headloss": (np.abs(r.unit_headloss) > MAX_UHL).astype(int),
        f"pressure_{su('pressure')[0]}".replace("pressure_", "pressure_rating_"):
            rating_psi * M_HEAD_PER_PSI * su("pressure")[1],
    }, geometry=lines, crs=CRS)
    return nodes, pipes, r


def hydrant_layer(net: Network, xy: np.ndarray, system: str = "US") -> gpd.GeoDataFrame:
    """Fire flow at a few hydrants on the max-day scenario (flow-test formula estimate)."""
    base = net.demand_m3s * SCENARIOS["max_day"]
    static = solve(net.replace(demand_m3s=base))
    at = np.array([0, 9, 17, 27, 35, 38, 44, 46, 47])
    test_q = 1000 * GPM
    res_target = 20 * M_HEAD_PER_PSI
    avail, resid, required = [], [], []
    for k, idx in enumerate(at):
        d = base.copy()
        d[idx] += test_q
        rf = solve(net.replace(demand_m3s=d), raise_on_failure=False)
        hs, hf = static.pressure_m[idx], rf.pressure_m[idx]
        q = test_q * (max(hs - res_target, 0.0) / max(hs - hf, 1e-6)) ** 0.54
        avail.append(q)
        req = 1500 * GPM if k % 3 == 0 else 1000 * GPM
        required.append(req)
        d = base.copy()
        d[idx] += req
        rr = solve(net.replace(demand_m3s=d), raise_on_failure=False)
        resid.append(rr.pressure_m[idx])
    avail, resid, required = map(np.array, (avail, resid, required))
    gpm = avail / GPM
    cls = np.select([gpm >= 1500, gpm >= 1000, gpm >= 500], ["AA", "A", "B"], "C")
    ps, pk = OUTPUT[system]["pressure"]
    fs, fk = OUTPUT[system]["flow"]
    return gpd.GeoDataFrame({
        "hydrant_id": [f"HYD-{300 + k}" for k in range(len(at))],
        "node_id": net.node_id[at].astype(str),
        "zone": net.zone[at].astype(str),
        f"static_pressure_{ps}": static.pressure_m[at] * pk,
        f"required_flow_{fs}": required * fk,
        f"available_flow_{fs}": avail * fk,
        f"residual_pressure_at_required_{ps}": resid * pk,
        "meets_required": (avail >= required).astype(int),
        "limited_by": np.where(avail >= required, "", "hydrant residual"),
        "nfpa_class": cls,
    }, geometry=shapely.points(xy[at] + [6.0, 6.0]), crs=CRS)


def build_layers(system: str = "US") -> tuple[dict, dict, Network]:
    """All result layers of a run, plus the solver results per scenario and the network."""
    net, xy, extra = build_network()
    layers: dict = {}
    results = {}
    for name, factor in SCENARIOS.items():
        n, p, r = scenario_layers(net, xy, extra, name, factor, system)
        layers[f"nodes_{name}"], layers[f"pipes_{name}"] = n, p
        results[name] = r
    layers["hydrants_fireflow"] = hydrant_layer(net, xy, system)
    layers["findings"] = gpd.GeoDataFrame({
        "kind": ["unsnapped_end", "missing_diameter", "closed_valve_cutoff"],
        "severity": ["warning", "error", "warning"],
        "layer": ["mains", "mains", "valves"],
        "feature_id": ["M-2011", "M-2040", "V-12"],
        "message": ["end 2.1 m from the nearest main", "diameter missing; 6 in assumed",
                    "closed valve <V-12> isolates 2 nodes"],
    }, geometry=[shapely.Point(X0 + 600, Y0 + 245),
                 shapely.LineString([(X0 + 240, Y0 + 360), (X0 + 360, Y0 + 360)]), None],
        crs=CRS)
    layers["changes"] = pd.DataFrame({
        "change": ["new", "new", "resolved"],
        "layer": ["nodes_peak_hour", "pipes_peak_hour", "nodes_max_day"],
        "feature_id": ["J-140", "M-2001", "J-133"],
        "flag": ["low_pressure", "high_velocity", "low_pressure"],
    })
    run_info = [("tool_version", "0.1.0"), ("name", "Millbrook nightly & test <run>"),
                ("unit_system", system), ("input:mains.gpkg", "sha256:ab12cd34")]
    run_info += [(f"iterations_{s}", str(r.iterations)) for s, r in results.items()]
    layers["run_info"] = pd.DataFrame(run_info, columns=["key", "value"])
    return layers, results, net


CRITERIA = CriteriaSection(min_pressure=MIN_P, max_pressure=MAX_P, max_velocity=MAX_V,
                           max_unit_headloss=MAX_UHL)


def report_data(system: str = "US", **overrides) -> tuple[ReportData, dict, Network]:
    """What the run hands the report, for the Millbrook test network (and its layers)."""
    layers, results, net = build_layers(system)
    _, xy, extra = build_network()
    scen = [ScenarioData.solved(name, net.replace(demand_m3s=net.demand_m3s * factor),
                                results[name], CRITERIA)
            for name, factor in SCENARIOS.items()]
    kw = dict(scenarios=scen, criteria=CRITERIA, units=system,
              name="Millbrook nightly & test <run>", node_xy=xy, crs="NAD83 / UTM zone 18N",
              pressure_rating_m=extra["pressure_rating_psi"] * M_HEAD_PER_PSI,
              hydrants=layers["hydrants_fireflow"], findings=layers["findings"],
              changes=layers["changes"], routine={"end_snapped": 1, "hydrant_attached": 9},
              run_info=[tuple(r) for r in layers["run_info"].itertuples(index=False)],
              worst_rows=10)
    kw.update(overrides)
    return ReportData(**kw), layers, net
