"""A rehearsal campaign with a goal on ν through the real driver, store and Dask workers."""

from __future__ import annotations

import json

from tests.campaign.helpers import cli, events, write_recipe
from tests.campaign.test_rehearsal import _calibration, _rows

GOAL = {
    "axes": {"widths": [4, 8, 16], "couplings": [-0.3, -0.2, -0.1, 0.0, 0.1, 0.2, 0.3]},
    # a loose floor (the 51 strip values of 4 replicas decide it): the goal rules
    "precision": {"target": 0.2, "max_layers": 800_000},
    "replica": {"layers": 2000, "warmup": 32, "strips": 13, "initial": 4},
    # self-dual (p = 0), so the slice is fitted with the symmetric forms
    "model": {"kind": "rehearsal", "nu": 2.6, "Gamma_c": 0.8, "F": [0.0, 0.85, 0.0, 0.02]}
    | {"noise": 0.5},
    # goal met after a few rounds on this law and entropy (3 allocation events when tuned)
    "goal": {"nu_halfwidth": 0.06, "cpu_hours": 1.0},
}


def _rounds(store):
    return [e for e in events(store) if e["event"] == "allocation"]


def test_a_goal_campaign_stores_the_same_replicas_when_cut_and_resumed(tmp_path):
    recipe = write_recipe(tmp_path / "recipe.toml", GOAL)
    cal = _calibration(tmp_path / "cal.json")
    whole = tmp_path / "whole"
    proc = cli("run", recipe, "--store", whole, "--workers", "1", "--calibration", cal)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "goal on nu: goal met" in proc.stdout, proc.stdout
    want = [(r["point_key"], r["replica"], r["gamma_strips"]) for r in _rows(whole)]
    rounds = _rounds(whole)
    assert [d["round"] for d in rounds] == list(range(1, len(rounds) + 1)) and len(rounds) >= 2
    assert [d["reason"] for d in rounds] == [None] * (len(rounds) - 1) + ["goal met"]
    # status replays the rounds: the goal, each slice's ν ± half-width, the stop reason
    proc = cli("status", whole, "--json", "--calibration", cal)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    goal = json.loads(proc.stdout)["totals"]["goal"]
    assert goal["reason"] == "goal met" and goal["round"] == len(rounds)
    (sl,) = goal["slices"].values()
    assert (
        sl["halfwidth"] <= GOAL["goal"]["nu_halfwidth"]
        and sl["nu"] == rounds[-1]["nu"]["pb=0.0|po=0.0|eps=1e-06"]
    )
    proc = cli("status", whole, "--calibration", cal)
    assert "stopped: goal met" in proc.stdout and "nu = " in proc.stdout, proc.stdout
    # the replicas went where they inform ν, not everywhere
    counts: dict[str, int] = {}
    for k, _, _ in want:
        counts[k] = counts.get(k, 0) + 1
    assert min(counts.values()) == 4 < max(counts.values())

    # two workers, and the driver stops itself right after deciding round 1
    cut = tmp_path / "cut"
    fault = {"SWEEPCTL_FAULT": "signal-after-round"}
    proc = cli("run", recipe, "--store", cut, "--workers", "2", "--calibration", cal, env=fault)
    assert proc.returncode == 130, proc.stdout + proc.stderr
    assert events(cut)[-1]["event"] == "interrupted"
    assert 0 < len(_rows(cut)) < len(want)
    assert [d["round"] for d in _rounds(cut)] == [1]
    # status mid-campaign: the CPU projected to the goal, beyond what is stored
    proc = cli("status", cut, "--json")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    g = json.loads(proc.stdout)["totals"]["goal"]
    assert g["reason"] is None and g["projected_cpu_hours"] > g["cpu_hours_spent"] > 0
    # resumed on "another machine": a calibration 3x faster at N = 4 and with the cost
    # growing as N^3, so its prices would shift replicas between widths
    other = _other_calibration(tmp_path / "other.json")
    assert _replayed_with(cut, other) != [d["replicas"] for d in rounds[:1]]
    proc = cli("run", recipe, "--store", cut, "--workers", "2", "--calibration", other)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert [(r["point_key"], r["replica"], r["gamma_strips"]) for r in _rows(cut)] == want
    # every decision logged once, and the same as the uninterrupted run's: the prices
    # were frozen with the store
    keep = ("round", "reason", "forms", "replicas", "nu", "nu_halfwidth", "cpu_seconds_spent")
    assert [{k: d[k] for k in keep} for d in _rounds(cut)] == [
        {k: d[k] for k in keep} for d in rounds
    ]
    # rehearsal rows are charged the frozen price, whichever calibration ran them
    assert [r["cpu_seconds"] for r in _rows(cut)] == [r["cpu_seconds"] for r in _rows(whole)]
    # audit replays the rounds from the stored rows and finds them as logged ...
    for store in (whole, cut):
        proc = cli("audit", store, "--json")
        assert proc.returncode == 0, proc.stdout + proc.stderr
        doc = json.loads(proc.stdout)
        assert doc["allocation"] == {
            "rounds_logged": len(rounds),
            "rounds_replayed": len(rounds),
            "reason": "goal met",
            "mismatches": 0,
        }
    # ... and names a logged decision the rows do not support
    lines = (whole / "events.jsonl").read_text().splitlines()
    forged = []
    for line in lines:
        e = json.loads(line)
        if e.get("event") == "allocation" and e["round"] == 1:
            k = sorted(e["replicas"])[0]
            e["replicas"][k] += 1
            line = json.dumps(e)
        forged.append(line)
    (whole / "events.jsonl").write_text("\n".join(forged) + "\n")
    proc = cli("audit", whole)
    assert proc.returncode == 1, proc.stdout + proc.stderr
    assert "allocation round 1: the logged replicas differ" in proc.stdout, proc.stdout
    # status needs no calibration once the prices are frozen
    proc = cli("status", cut, "--json")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert json.loads(proc.stdout)["totals"]["goal"]["reason"] == "goal met"

    # plan with a goal: on the finished store the pilot is what rounds 0 stored and the
    # projection is what was spent (the goal is met on these prefixes: nothing to add)
    proc = cli("plan", recipe, cut, "--json", "--calibration", other)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    g = json.loads(proc.stdout)["goal"]
    rows = _rows(cut)
    pilot = [r for r in rows if r["replica"] < GOAL["replica"]["initial"]]
    assert g["pilot_replicas"] == len(pilot)
    assert abs(g["pilot_cpu_hours"] - sum(r["cpu_seconds"] for r in pilot) / 3600) < 1e-12
    spent = sum(r["cpu_seconds"] for r in rows) / 3600
    assert g["basis"] == f"the store's {len(rows):,} replicas"
    assert abs(g["projected_cpu_hours"] - spent) <= 1e-9 * spent
    # without a store, a rehearsal recipe's pilot is drawn in process with the same seeds
    proc = cli("plan", recipe, "--json", "--calibration", cal)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    g = json.loads(proc.stdout)["goal"]
    assert g["basis"] == "a pilot round drawn from the rehearsal law"
    assert g["pilot_cpu_hours"] < g["projected_cpu_hours"] < GOAL["goal"]["cpu_hours"]
    proc = cli("plan", recipe, "--calibration", cal)
    assert "projected to the goal: about" in proc.stdout, proc.stdout
    # the network kernel's pilot must be run before anything can be projected
    net = write_recipe(tmp_path / "net.toml", {k: v for k, v in GOAL.items() if k != "model"})
    proc = cli("plan", net, "--json", "--calibration", cal)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    g = json.loads(proc.stdout)["goal"]
    assert g["projected_cpu_hours"] is None and g["pilot_cpu_hours"] > 0
    assert "run the pilot round" in g["note"]


def _other_calibration(path):
    # another machine's prices: columns ∝ N³ instead of N², 3× cheaper at N = 4
    return _calibration(path, column=3.3e-6, power=3.0)


def _replayed_with(store, cal_path):
    """Round 1's replicas as the stored pilot would get them priced by ``cal_path``."""
    from sweepctl.campaign.cost import CostModel
    from sweepctl.campaign.progress import GoalRounds, build_progress
    from sweepctl.campaign.store import Store
    from sweepctl.campaign.summary import store_recipe

    st = Store(store)
    _, recipe, frozen = store_recipe(st)
    cost = CostModel(json.loads(cal_path.read_text())["widths"])
    progress = build_progress(recipe, frozen, st.read_replicas())
    price = lambda pp: cost.replica_seconds(pp.point, pp.layers, pp.warmup, frozen.strips)  # noqa: E731
    return [d["replicas"] for d in GoalRounds(recipe, frozen, price).advance(progress)[:1]]
