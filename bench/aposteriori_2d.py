"""Benchmark: long a posteriori runs of 2-D closures, the model chosen by coarse runs among them.

    python bench/aposteriori_2d.py            # 256^2 -> 64^2, 100 large-eddy turnovers
    python bench/aposteriori_2d.py --quick    # 128^2 -> 32^2, 10 turnovers (minutes)

Steps, all in this process:

1. the fine run: forced 2-D turbulence from closure's own generator (``closure.synth.turb2d``,
   its default physics: nu 1e-3, drag 0.1, steady shell forcing at mode 4), ``--snapshots``
   snapshots every ``--interval`` s after a ``--dns-spinup``; the file states its wall time
   and simulated time, the cost the coarse runs are measured against;
2. the large-eddy turnover time ``T = l / u'`` of the filtered reference, with the integral
   scale ``l = int E(k)/k dk / int E(k) dk`` and ``u' = sqrt(2 E)``, time-averaged over the
   snapshots;
3. discovery (Gaussian filter, width 8 fine grid spacings, ratio 4, the default stress
   library): the plain a priori model, the a priori model with the energy transfer in the fit
   (transfer weight 1), and the model selected by coarse runs
   (:func:`closure.selection.discover_and_select`, what ``closure discover --select
   aposteriori`` runs): the sparsest candidates of the sparse paths at ``--weights`` and
   their dynamic mixed companions each run for the bench's duration and spin-up
   (``--selection-turnovers`` shortens them);
4. long coarse runs (``closure.les.simulate`` with ``long_duration``) of the a priori models
   and every baseline from the first snapshot: ``--spinup-turnovers`` of spin-up, then
   ``--turnovers`` turnover times of statistics compared with every snapshot of the filtered
   DNS. The selected model's row is its run in the selection (same start, physics, duration,
   spin-up and sampling as the table's runs) unless the selection ran shorter, then it is
   rerun at full length;
5. the selected model and every baseline again from a second snapshot (``--second-start``,
   default the middle one): how far the figures move between two starts is the sampling
   noise against which the verdict has to be read.

Prints the selection's candidates, the table of every run's long-run figures, the coarse-to-fine
cost ratio and the verdict against the goal (stable for the whole run, lower long-run spectrum
error and vorticity-PDF distance than every classic baseline); writes the whole record to
``--out`` (JSON and markdown, default bench/results/aposteriori_2d[-quick].{json,md}). No
assertion: a measurement. A priori skill does not guarantee a stable or accurate coarse
simulation, and long-run statistics on one flow are evidence, not a guarantee.
"""

from __future__ import annotations

import argparse
import json
import math
import platform
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import xarray as xr

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from closure.les import _finite, coarse_data, simulate  # noqa: E402
from closure.selection import discover_and_select, run_physics  # noqa: E402
from closure.spec import parse_spec  # noqa: E402
from closure.spectral import energy_spectrum  # noqa: E402
from closure.synth import turb2d, write  # noqa: E402

RATIO, WIDTH = 4, 8.0
BASELINES = ["none", "smagorinsky", "dynamic", "gradient", "gradient-clipped"]
SELECTED = "selected"
FIGURES = ("stable", "blowup_time", "reached", "spectrum_error", "vorticity_pdf_distance",
           "mean_energy_ratio", "mean_enstrophy_ratio", "transfer_error")


def turnover_time(path: Path, components=("u", "v")) -> float:
    """Time-mean large-eddy turnover time l / u' of the filtered snapshots (s), with
    ``u' = sqrt(2 E)`` in 2-D and ``sqrt(2 E / 3)`` in 3-D (as the benches always used)."""
    data = coarse_data(path, "gaussian", RATIO, WIDTH)
    out = []
    for f in data.fields:
        k, E = energy_spectrum(tuple(f[c] for c in components), data.grid)
        k, E = k[1:], E[1:]  # the mean mode holds no energy
        dk = k[1] - k[0]
        energy = float(np.sum(E)) * dk
        scale = float(np.sum(E / k)) * dk / energy
        out.append(scale / np.sqrt(2 * energy / (1 if len(components) == 2 else 3)))
    return float(np.mean(out))


def fine_cost(path: Path) -> dict:
    """The fine run's wall seconds and simulated time as its file states them."""
    with xr.open_dataset(path) as ds:
        return {"wall_seconds": float(ds.attrs["wall_seconds"]),
                "simulated_time": float(ds.attrs["simulated_time"]),
                "steps": int(ds.attrs.get("steps", 0)) or None}


def discover_spec(dns: Path, *, transfer_weight: float = 0.0, select: bool = False,
                  duration: float | None = None, spinup: float = 0.0,
                  weights=(0.0, 1.0), tolerance: float = 0.1):
    """The job spec of the bench's discovery (what ``closure discover`` builds)."""
    fit = {"transfer_weight": transfer_weight}
    if select:
        fit.update(select="aposteriori", duration=duration, spinup=spinup,
                   transfer_weights=list(weights), tolerance=tolerance)
    return parse_spec({"input": {"path": str(dns)},
                       "filter": {"kind": "gaussian", "width": WIDTH, "ratio": RATIO},
                       "fit": fit})


def apriori_models(dns: Path, folder: Path) -> dict:
    """The plain a priori model and the one fitted with the energy transfer (weight 1)."""
    from closure.pipeline import discover

    models = {}
    for label, weight in (("a priori", 0.0), ("a priori, transfer 1", 1.0)):
        model = discover(discover_spec(dns, transfer_weight=weight))
        model.save(folder / f"model-transfer{weight:g}.json")
        models[label] = model
        print(f"{label}: {', '.join(t.name for t in model.active_terms)}", flush=True)
    return models


def select_model(dns: Path, folder: Path, *, duration: float, spinup: float, weights,
                 max_per_path: int, tolerance: float):
    """discover_and_select in this process; returns (selection, chosen model or None, wall)."""
    t = time.perf_counter()
    spec = discover_spec(dns, select=True, duration=duration, spinup=spinup, weights=weights,
                         tolerance=tolerance)

    def progress(phase, done, total):
        if phase == "coarse runs":
            print(f"  selection: {phase} {done}/{total} ({time.perf_counter() - t:.0f} s)",
                  flush=True)

    _, selection, chosen = discover_and_select(spec, max_per_path=max_per_path,
                                               progress=progress)
    wall = time.perf_counter() - t
    if chosen is not None:
        chosen.save(folder / "model-selected.json")
    print(selection.table(), flush=True)
    print(f"selection took {wall:.0f} s wall for {len(selection.candidates)} candidates",
          flush=True)
    return selection, chosen, wall


def long_runs(models: dict, dns: Path, *, duration: float, spinup: float,
              baselines=BASELINES):
    """The long runs of ``models`` (label -> model) and ``baselines``: the table's
    Comparison (all long runs merged) and each run's physics."""
    table, physics = None, {}
    for i, (label, model) in enumerate(models.items()):
        c = simulate(model, dns, model_label=label, baselines=baselines if i == 0 else [],
                     long_duration=duration, spinup=spinup)
        for name in c.long_runs:
            c.long_runs[name]["wall_seconds"] = c.runs[name].wall_seconds
            physics[name] = run_physics(c.settings)
        if table is None:
            table = c
        else:
            table.long_runs.update(c.long_runs)
        print(f"  long runs done: {', '.join(c.long_runs)}", flush=True)
    return table, physics


def add_selected(table, selection, chosen, dns: Path, *, duration: float, spinup: float,
                 selection_duration: float) -> dict:
    """Put the selected model's long-run figures into ``table`` (its selection run when that
    was as long as the table's, else a rerun) and return its physics."""
    record = next(r for r in selection.candidates if r["label"] == selection.chosen)
    if math.isclose(selection_duration, duration, rel_tol=1e-12):
        table.long_runs[SELECTED] = {**record["long_run"],
                                     "wall_seconds": record.get("wall_seconds")}
        return record["physics"]
    c = simulate(chosen, dns, model_label=SELECTED, long_duration=duration, spinup=spinup)
    table.long_runs[SELECTED] = {**c.long_runs[SELECTED],
                                 "wall_seconds": c.runs[SELECTED].wall_seconds}
    return run_physics(c.settings)


def second_start(chosen, dns: Path, index: int, *, duration: float, spinup: float) -> dict:
    """The selected model and every baseline run again from snapshot ``index`` (a different
    trajectory of the same flow, same length and reference): how much the long-run figures
    move between two starts is the sampling noise of the comparison."""
    c = simulate(chosen, dns, model_label=SELECTED, baselines=BASELINES, initial_index=index,
                 long_duration=duration, spinup=spinup)
    return {name: {m: f.get(m) for m in FIGURES} for name, f in c.long_runs.items()}


def noise_lines(first: dict, second: dict, index: int) -> list[str]:
    """Each run's figures from both starts and their relative change."""
    lines = [f"second start (snapshot {index}): spectrum err and PDF dist from the first start "
             "-> the second (relative change)"]
    for name, g in second.items():
        f = first[name]
        parts = []
        for key, label in (("spectrum_error", "spectrum err"),
                           ("vorticity_pdf_distance", "PDF dist")):
            a, b = f.get(key), g.get(key)
            change = "" if a is None or b is None else f" ({100 * (b - a) / a:+.0f}%)"
            parts.append(f"{label} {_f(a)} -> {_f(b)}{change}")
        state = "" if g["stable"] else " (blew up)"
        lines.append(f"  {name}{state}: {'; '.join(parts)}")
    return lines


def _lower(a: dict, b: dict, key: str) -> bool:
    if a.get(key) is None or not a["stable"]:
        return False
    if b.get(key) is None or not b["stable"]:
        return True
    return a[key] < b[key]


def verdict(figures: dict, label: str, classic) -> dict:
    """The goal for run ``label``: stable for the whole run and lower long-run spectrum error
    and vorticity-PDF distance than every classic baseline; which it beats, by how much."""
    f = figures[label]
    rows = []
    for b in classic:
        g = figures[b]
        row = {"baseline": b, "baseline_stable": bool(g["stable"])}
        for key in ("spectrum_error", "vorticity_pdf_distance"):
            row[key] = {"model": f.get(key), "baseline": g.get(key),
                        "lower": _lower(f, g, key)}
        row["beats"] = row["spectrum_error"]["lower"] and row["vorticity_pdf_distance"]["lower"]
        rows.append(row)
    beaten = [r["baseline"] for r in rows if r["beats"]]
    return {"run": label, "stable": bool(f["stable"]), "blowup_time": f.get("blowup_time"),
            "beats": beaten, "does_not_beat": [r["baseline"] for r in rows if not r["beats"]],
            "met": bool(f["stable"]) and len(beaten) == len(rows), "against": rows}


def verdict_text(v: dict) -> str:
    state = ("stable for the whole run" if v["stable"]
             else f"NOT stable (blew up at {v['blowup_time']:.4g} s)")
    lines = [f"{v['run']}: {state}; lower spectrum error and PDF distance than "
             f"{len(v['beats'])} of {len(v['against'])} classic baselines "
             f"({', '.join(v['beats']) or 'none'}); goal {'MET' if v['met'] else 'NOT met'}"]
    for r in v["against"]:
        parts = []
        for key, name in (("spectrum_error", "spectrum err"),
                          ("vorticity_pdf_distance", "PDF dist")):
            m, b = r[key]["model"], r[key]["baseline"]
            if m is None or b is None:
                parts.append(f"{name} {_f(m)} vs {_f(b)}")
            else:
                parts.append(f"{name} {m:.3g} vs {b:.3g} ({100 * (m - b) / b:+.0f}%)")
        tag = "beats" if r["beats"] else "does not beat"
        extra = "" if r["baseline_stable"] else " (baseline blew up)"
        lines.append(f"  {tag} {r['baseline']}{extra}: {'; '.join(parts)}")
    return "\n".join(lines)


def _f(v) -> str:
    return "-" if v is None else f"{v:.3g}"


def cost_lines(figures: dict, fine: dict | None) -> tuple[list[str], dict]:
    """Each run's wall seconds per simulated second and the coarse/fine ratio."""
    out, lines = {}, []
    fine_rate = (fine["wall_seconds"] / fine["simulated_time"]) if fine else None
    for name, f in figures.items():
        wall, reached = f.get("wall_seconds"), f.get("reached")
        if not wall or not reached:
            continue
        simulated = reached  # from the start to the last sample (or the blow-up)
        rate = wall / simulated
        out[name] = {"wall_seconds": wall, "simulated_time": simulated,
                     "per_simulated_second": rate,
                     "fine_over_coarse": None if fine_rate is None else fine_rate / rate}
    rates = [v["per_simulated_second"] for v in out.values()]
    if rates:
        mean = float(np.mean(rates))
        text = f"cost: {mean:.3g} s wall per simulated s per coarse run (mean of {len(rates)})"
        if fine_rate:
            text += (f" against {fine_rate:.3g} for the fine run ({fine['wall_seconds']:.4g} s "
                     f"wall for {fine['simulated_time']:.4g} s simulated): the coarse run is "
                     f"{fine_rate / mean:.3g} times cheaper")
        lines.append(text)
    return lines, {"fine": fine, "coarse": out}


def physics_check(physics: dict) -> tuple[bool, str]:
    """Whether every run (table and selection) used the same physics, and a line saying so."""
    distinct = {json.dumps(_finite(p), sort_keys=True) for p in physics.values()}
    if len(distinct) == 1:
        p = next(iter(physics.values()))
        return True, (f"physics: every run (baselines, models, selection candidates) used nu "
                      f"{p['viscosity']:g}, drag {p['drag']:g}, forcing {p['forcing']}, "
                      f"dealias {p['dealias']} (the fine run's, from its file)")
    return False, "physics: NOT the same in every run: " + json.dumps(_finite(physics))


def write_results(out: Path, record: dict, table_text: str, selection_text: str,
                  verdicts: list[str], extra: list[str]) -> None:
    """The record as JSON and a markdown page beside it (atomic)."""
    from closure.atomic import write_text

    out.parent.mkdir(parents=True, exist_ok=True)
    write_text(out.with_suffix(".json"), json.dumps(_finite(record), indent=1,
                                                    allow_nan=False) + "\n")
    md = [f"# {record['title']}", "", f"Command: `{record['command']}`", "",
          f"Measured {record['date']} on {record['machine']}.", ""]
    md += [f"- {line}" for line in extra]
    md += ["", "## Selection by coarse runs", "", "```", selection_text, "```", "",
           "## Long-run table", "", "```", table_text, "```", "", "## Verdict", "", "```",
           *verdicts, "```", "", record["note"], ""]
    write_text(out.with_suffix(".md"), "\n".join(md))


NOTE = ("A priori skill does not guarantee a stable or accurate coarse simulation. These are "
        "time-averaged statistics of one flow (one forcing, one Reynolds number, one filter "
        "width) from one initial snapshot: evidence on this flow, not a guarantee for others; "
        "they compare statistics, not trajectories, and the selection saw the same reference "
        "statistics the table reports (no held-out flow).")


def add_selection_options(p) -> None:
    """The options of the selection by coarse runs and the second start (both benches)."""
    p.add_argument("--selection-turnovers", type=float, default=None,
                   help="statistics length of the selection's candidate runs (default: the "
                        "table's)")
    p.add_argument("--weights", default="0,1,4", help="transfer weights of the candidate paths")
    p.add_argument("--max-candidates", type=int, default=4, help="sparsest per path")
    p.add_argument("--tolerance", type=float, default=0.1)
    p.add_argument("--second-start", type=int, default=None,
                   help="also run the selected model and the baselines from this snapshot "
                        "(default: the middle one; -1: not)")


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="128^2 -> 32^2, 10 turnovers")
    p.add_argument("--n", type=int, default=None, help="fine grid points per direction")
    p.add_argument("--snapshots", type=int, default=None)
    p.add_argument("--interval", type=float, default=1.0, help="s between DNS snapshots")
    p.add_argument("--dns-spinup", type=float, default=10.0, help="s before the first one")
    p.add_argument("--turnovers", type=float, default=None,
                   help="long-run length after the spin-up, in turnover times")
    p.add_argument("--spinup-turnovers", type=float, default=None)
    add_selection_options(p)
    p.add_argument("--keep", type=Path, default=None, help="keep the files in this folder")
    p.add_argument("--reuse", action="store_true",
                   help="reuse the fine run already in --keep (its cost from its attributes)")
    p.add_argument("--out", type=Path, default=None, help="results file stem (.json, .md)")
    a = p.parse_args(argv)
    n = a.n or (128 if a.quick else 256)
    snapshots = a.snapshots or (12 if a.quick else 40)
    turnovers = a.turnovers or (10.0 if a.quick else 100.0)
    spin_turnovers = a.spinup_turnovers or (2.0 if a.quick else 10.0)
    weights = [float(w) for w in a.weights.split(",")]
    out = a.out or ROOT / "bench" / "results" / ("aposteriori_2d" + ("-quick" if a.quick
                                                                     else ""))

    folder = a.keep or Path(tempfile.mkdtemp(prefix="aposteriori-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    dns = folder / "dns.nc"
    if a.reuse and dns.is_file():
        print(f"reusing {dns}")
    else:
        write(turb2d(n=n, snapshots=snapshots, interval=a.interval, spinup=a.dns_spinup), dns)
    fine = fine_cost(dns)
    print(f"fine run {n}^2: {fine['simulated_time']:g} s simulated in "
          f"{fine['wall_seconds']:.1f} s wall", flush=True)
    return finish(a, dns, folder, out, fine, dims=2, n=n, snapshots=snapshots,
                  turnovers=turnovers, spin_turnovers=spin_turnovers, weights=weights,
                  components=("u", "v"))


def finish(a, dns: Path, folder: Path, out: Path, fine: dict | None, *, dims: int, n: int,
           snapshots: int, turnovers: float, spin_turnovers: float, weights,
           components) -> int:
    """Steps 2-4 and the results, shared by the 2-D and 3-D benches."""
    T = turnover_time(dns, components)
    spinup = spin_turnovers * T
    duration = spinup + turnovers * T
    sel_turnovers = a.selection_turnovers or turnovers
    sel_duration = spinup + sel_turnovers * T
    print(f"large-eddy turnover time {T:.3g} s; long runs of {duration:.4g} s "
          f"({spin_turnovers:g} T spin-up + {turnovers:g} T of statistics); selection runs "
          f"of {sel_duration:.4g} s", flush=True)

    t0 = time.perf_counter()
    models = apriori_models(dns, folder)
    selection, chosen, sel_wall = select_model(
        dns, folder, duration=sel_duration, spinup=spinup, weights=weights,
        max_per_path=a.max_candidates, tolerance=a.tolerance)
    table, physics = long_runs(models, dns, duration=duration, spinup=spinup)
    for r in selection.candidates:
        physics[f"candidate {r['label']}"] = r["physics"]
    if chosen is not None:
        physics[SELECTED] = add_selected(table, selection, chosen, dns, duration=duration,
                                         spinup=spinup, selection_duration=sel_duration)
    figures = table.long_runs
    table_text = table.long_run_table()
    print()
    print(table_text)
    print()
    same, physics_line = physics_check(physics)
    cost, cost_record = cost_lines(figures, fine)
    extra = [physics_line, *cost]
    if sel_duration < duration:
        extra.append(f"the selection's candidate runs were shorter ({sel_turnovers:g} T of "
                     f"statistics) than the table's ({turnovers:g} T); the selected model was "
                     "rerun at full length for the table")
    else:
        extra.append("the selection's candidate runs were as long as the table's; the "
                     "selected model's row is its selection run")
    for line in extra:
        print(line)
    classic = [b for b in BASELINES if b in figures]
    runs = ([SELECTED] if SELECTED in figures else []) + list(models)
    verdicts = [verdict(figures, r, classic) for r in runs]
    texts = [verdict_text(v) for v in verdicts]
    if chosen is None:
        texts.insert(0, "no candidate was stable for the whole run: nothing was selected")
    index = a.second_start if a.second_start is not None else snapshots // 2
    second, noise = None, []
    if chosen is not None and 0 < index < snapshots:
        second = second_start(chosen, dns, index, duration=duration, spinup=spinup)
        noise = noise_lines(figures, second, index)
        v2 = verdict(second, SELECTED, [b for b in BASELINES if b in second])
        noise.append(f"  from the second start the selected model beats {len(v2['beats'])} of "
                     f"{len(v2['against'])} baselines ({', '.join(v2['beats']) or 'none'})")
        texts += ["", *noise]
    print()
    for text in texts:
        print(text)
    print(NOTE)
    record = {
        "title": f"A posteriori benchmark, {dims}-D: {n}^{dims} -> {n // RATIO}^{dims}",
        "command": "python3 " + " ".join([f"bench/aposteriori_{dims}d.py", *sys.argv[1:]]),
        "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
        "machine": f"{platform.machine()}, {platform.processor() or '?'}; shared 2 cores",
        "fine_grid": f"{n}^{dims}", "coarse_grid": f"{n // RATIO}^{dims}",
        "filter": {"kind": "gaussian", "width": WIDTH, "ratio": RATIO},
        "snapshots": snapshots, "turnover_time": T, "spinup": spinup, "duration": duration,
        "turnovers": turnovers, "spinup_turnovers": spin_turnovers,
        "selection": {**selection.to_dict(), "duration": sel_duration,
                      "turnovers": sel_turnovers, "weights": weights,
                      "max_candidates": a.max_candidates, "wall_seconds": sel_wall},
        "selected_terms": None if chosen is None else [t.name for t in chosen.active_terms],
        "apriori_terms": {k: [t.name for t in m.active_terms] for k, m in models.items()},
        "long_runs": {k: {m: f.get(m) for m in (*FIGURES, "wall_seconds",
                                                "vorticity_quantiles", "spectrum_band_error")}
                      for k, f in figures.items()},
        "physics_same": same, "physics": physics, "cost": cost_record,
        "verdicts": verdicts,
        "second_start": None if second is None else {"snapshot": index, "long_runs": second},
        "total_wall_seconds": time.perf_counter() - t0,
        "note": NOTE,
    }
    write_results(out, record, table_text, selection.table(), texts, extra)
    print(f"written: {out.with_suffix('.json')}, {out.with_suffix('.md')}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
