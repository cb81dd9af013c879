"""Selection of a closure by coarse runs (a posteriori), in process.

A priori scores rank the models along a sparse path by how well they fit the subgrid term;
they say nothing about whether a model stays stable when it feeds a coarse simulation. Here
every candidate along the path (at one or more transfer weights) runs long in the coarse
solver (:func:`closure.les.simulate` with ``long_duration``), one after another, and

    the chosen model is the sparsest candidate that is stable for the whole run and whose
    long-run score (spectrum error + vorticity-PDF Hellinger distance) is within
    ``tolerance`` (relative) of the best stable candidate's score; ties go to the lower
    score. None is chosen when no candidate is stable.

:func:`plan_candidates` is a pure function of the fitted paths and :func:`plan_from_stats`
of a mapped job's statistics (what the queue fans out); :func:`run_candidate` is one
candidate's run (one queued task each in worker/selection.py, one after another in
:func:`select_by_coarse_runs`); :func:`choose` and :func:`conclude` are pure functions of the
candidates' records, and return a :class:`Selection` that records every candidate with its
a priori and a posteriori figures. The candidates start from the first snapshot of the job's
first input and are compared with the statistics of every snapshot of that input. Long-run
statistics on one flow are evidence, not a guarantee.

Candidates fitted a priori match the filter's subgrid stress; a long coarse run also needs the
transfer across its own truncation, which no a priori target holds. So each candidate without
the eddy-viscosity term also runs with it, its coefficient from the Germano identity on the
resolved training snapshots (the dynamic mixed model; :func:`eddy_companions`), fixed before
any run; the rule above decides between them like any other candidates.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from closure.errors import OptionError, UserError

#: default relative tolerance on the long-run score
TOLERANCE = 0.1
RULE = ("sparsest candidate stable for the whole run with long-run score (spectrum error + "
        "vorticity-PDF distance) within the tolerance of the best stable score")


@dataclass(frozen=True)
class Candidate:
    """One model along a sparse path: coefficients in design units (one per library term,
    zero when unselected), its transfer weight and path parameter, and a priori figures."""

    label: str
    transfer_weight: float
    parameter: float
    coefficients: tuple[float, ...]
    terms: tuple[str, ...]
    apriori: dict = field(default_factory=dict)

    @property
    def n_terms(self) -> int:
        return int(sum(1 for c in self.coefficients if c != 0.0))

    @property
    def active_terms(self) -> list[str]:
        return [t for t, c in zip(self.terms, self.coefficients, strict=True) if c != 0.0]


def plan_candidates(paths: Mapping[float, object], max_per_path: int | None = None
                    ) -> list[Candidate]:
    """Candidates along the sparse paths of fits at several transfer weights (pure).

    ``paths`` maps transfer weight -> a fit with ``terms``, ``path.parameters``,
    ``path.coefficients`` (m, p), ``path.supports`` (m, p) and optionally ``cv.mean`` (the
    cross-validated error per path point), e.g. :class:`closure.regression.FitResult`. One
    candidate per distinct non-empty support (the first path point that has it), sparsest
    first, at most ``max_per_path`` per weight (the sparsest ones).
    """
    out: list[Candidate] = []
    for weight in sorted(paths):
        fit = paths[weight]
        path = fit.path
        coefs = np.asarray(path.coefficients, dtype=float)
        supports = np.asarray(path.supports, dtype=bool)
        cv = getattr(getattr(fit, "cv", None), "mean", None)
        seen, mine = set(), []
        for i in range(coefs.shape[0]):
            key = tuple(bool(s) for s in supports[i])
            if not any(key) or key in seen:
                continue
            seen.add(key)
            c = np.where(supports[i], coefs[i], 0.0)
            apriori = {"cv_error": None if cv is None else float(np.asarray(cv)[i])}
            mine.append((int(sum(key)), i, c, apriori))
        mine.sort(key=lambda m: (m[0], m[1]))
        if max_per_path is not None:
            mine = mine[:max_per_path]
        for n, i, c, apriori in mine:
            out.append(Candidate(f"w{weight:g}-{n}terms", float(weight),
                                 float(np.asarray(path.parameters)[i]),
                                 tuple(float(x) for x in c), tuple(fit.terms), apriori))
    return out


def score(figures: Mapping) -> float | None:
    """Long-run score of a run's figures: spectrum error + vorticity-PDF distance."""
    a, b = figures.get("spectrum_error"), figures.get("vorticity_pdf_distance")
    if a is None or b is None or not (math.isfinite(a) and math.isfinite(b)):
        return None
    return float(a + b)


def choose(records: Sequence[Mapping], tolerance: float = TOLERANCE) -> str | None:
    """The chosen label among ``records`` ({"label", "n_terms", "long_run": figures}) by the
    module's rule (pure); None when no candidate is stable with a score."""
    if not tolerance >= 0:
        raise OptionError(f"the selection tolerance must be >= 0, got {tolerance}")
    ok = [(r, score(r["long_run"])) for r in records if r["long_run"].get("stable")]
    ok = [(r, s) for r, s in ok if s is not None]
    if not ok:
        return None
    best = min(s for _, s in ok)
    within = [(r, s) for r, s in ok if s <= best * (1 + tolerance) + 1e-15]
    within.sort(key=lambda rs: (rs[0]["n_terms"], rs[1]))
    return within[0][0]["label"]


@dataclass
class Selection:
    """The candidates' records (label, n_terms, terms, transfer_weight, parameter, apriori,
    long_run figures, score) in run order, the chosen label (or None), tolerance and rule."""

    candidates: list[dict]
    chosen: str | None
    tolerance: float
    settings: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"rule": RULE, "tolerance": self.tolerance, "chosen": self.chosen,
                "candidates": self.candidates, "settings": self.settings,
                "note": "A priori skill does not guarantee a stable or accurate coarse "
                        "simulation; the chosen model was stable on this flow for this run "
                        "length, which is evidence, not a guarantee."}

    def table(self) -> str:
        head = ["candidate", "terms", "weight", "a priori cv err", "stable", "blow-up t",
                "spectrum err", "PDF dist", "score", ""]
        rows = []
        for r in self.candidates:
            f = r["long_run"]
            rows.append([r["label"], str(r["n_terms"]), f"{r['transfer_weight']:g}",
                         _fmt(r["apriori"].get("cv_error")), "yes" if f["stable"] else "no",
                         _fmt(f.get("blowup_time")), _fmt(f.get("spectrum_error")),
                         _fmt(f.get("vorticity_pdf_distance")), _fmt(r["score"]),
                         "chosen" if r["label"] == self.chosen else ""])
        widths = [max(len(x[i]) for x in [head, *rows]) for i in range(len(head))]
        lines = ["  ".join(c.ljust(w) for c, w in zip(x, widths, strict=True)).rstrip()
                 for x in [head, *rows]]
        lines.append(f"rule: {RULE} (tolerance {self.tolerance:g})")
        return "\n".join(lines)


def _fmt(v) -> str:
    return "-" if v is None or not math.isfinite(v) else f"{v:.3g}"


def candidate_model(base, candidate: Candidate):
    """A copy of the ClosureModel ``base`` (its library, filter, grid, scheme, width) with the
    candidate's coefficients."""
    from closure.model import ClosureModel

    if tuple(base.library.names) != tuple(candidate.terms):
        raise UserError("the candidate's terms are not the model's library terms")
    return ClosureModel(base.library, candidate.coefficients, filter=base.filter,
                        grid=base.grid, scheme=base.scheme, delta=base.delta,
                        provenance=base.provenance, method=base.method,
                        settings={**base.settings, "candidate": candidate.label})


def candidate_to_dict(candidate: Candidate) -> dict:
    """A candidate as plain JSON (what the queue carries)."""
    return {"label": candidate.label, "transfer_weight": candidate.transfer_weight,
            "parameter": candidate.parameter, "coefficients": list(candidate.coefficients),
            "terms": list(candidate.terms), "apriori": candidate.apriori}


def candidate_from_dict(d: Mapping) -> Candidate:
    """The inverse of :func:`candidate_to_dict`."""
    return Candidate(str(d["label"]), float(d["transfer_weight"]), float(d["parameter"]),
                     tuple(float(x) for x in d["coefficients"]), tuple(d["terms"]),
                     dict(d.get("apriori") or {}))


def run_candidate(base, candidate: Candidate, initial, reference=None, *,
                  long_duration: float, spinup: float | None = None,
                  **simulate_options) -> dict:
    """One candidate's coarse run (:func:`closure.les.simulate` with ``long_duration``, no
    baselines) and its record: label, n_terms, terms, transfer_weight, parameter, apriori,
    long_run figures, score, the run's physics (:func:`run_physics`) and wall seconds (plain
    JSON)."""
    from closure.les import simulate

    model = candidate_model(base, candidate)
    c = simulate(model, initial, reference, model_label=candidate.label, baselines=[],
                 long_duration=long_duration, spinup=spinup, **simulate_options)
    figures = {k: v for k, v in c.long_runs[candidate.label].items()
               if k not in ("series", "statistics")}
    return _plain({"label": candidate.label, "n_terms": candidate.n_terms,
                   "terms": candidate.active_terms,
                   "transfer_weight": candidate.transfer_weight,
                   "parameter": candidate.parameter, "apriori": dict(candidate.apriori),
                   "long_run": figures, "score": score(figures),
                   "physics": run_physics(c.settings),
                   "wall_seconds": c.runs[candidate.label].wall_seconds})


#: the settings of a coarse run that state its physics
PHYSICS_KEYS = ("viscosity", "drag", "hyperviscosity_order", "hypoviscosity",
                "hypoviscosity_order", "forcing", "dealias", "assumed_physics")


def run_physics(settings: Mapping) -> dict:
    """The physics a coarse run used (viscosity, drag, forcing, ...) from its
    ``Comparison.settings``, so that runs can be checked to share it."""
    return {k: settings.get(k) for k in PHYSICS_KEYS}


def conclude(base, candidates: Sequence[Candidate], records: Sequence[Mapping], *,
             long_duration: float, spinup: float | None = None,
             tolerance: float = TOLERANCE) -> tuple[Selection, object | None]:
    """Choose among the run ``records`` (in candidate order) and build the chosen model,
    which records the selection in ``settings["aposteriori_selection"]`` (None when no
    candidate is stable)."""
    chosen = choose(records, tolerance)
    selection = Selection([dict(r) for r in records], chosen, float(tolerance),
                          {"long_duration": float(long_duration),
                           "spinup": 0.0 if spinup is None else float(spinup)})
    model = None
    if chosen is not None:
        cand = next(c for c in candidates if c.label == chosen)
        model = candidate_model(base, cand)
        model.settings["aposteriori_selection"] = _plain(selection.to_dict())
        if "test" in cand.apriori:
            model.scores = {"test": cand.apriori["test"]}
    return selection, model


def unselected_model(base, selection: Selection):
    """The a priori model, kept when no candidate was stable: it records the selection and
    says in its notes that it was not chosen by coarse runs."""
    model = candidate_model(base, Candidate("a priori", 0.0, 0.0,
                                            tuple(float(x) for x in base.coefficients_scaled),
                                            tuple(base.library.names)))
    model.scores = getattr(base, "scores", None)
    model.settings["aposteriori_selection"] = _plain(selection.to_dict())
    notes = list((model.provenance or {}).get("notes") or [])
    notes.append(NO_STABLE_NOTE.format(duration=selection.settings["long_duration"]))
    model.provenance = {**(model.provenance or {}), "notes": notes}
    return model


NO_STABLE_NOTE = ("no candidate was stable for the whole {duration:g} s coarse run: this is "
                  "the a priori model, NOT chosen by coarse runs; expect it to blow up in a "
                  "long simulation of this flow")


def select_by_coarse_runs(base, candidates: Sequence[Candidate], initial, reference=None, *,
                          long_duration: float, spinup: float | None = None,
                          tolerance: float = TOLERANCE,
                          progress: Callable[[str, int, int], None] | None = None,
                          **simulate_options) -> tuple[Selection, object | None]:
    """Run every candidate long (one after another) and choose by :func:`choose`.

    ``base`` is the fitted ClosureModel whose library the candidates use; the other options
    go to :func:`closure.les.simulate`. Returns the Selection and the chosen model (None
    when no candidate is stable), which records the selection in
    ``settings["aposteriori_selection"]``.
    """
    if not candidates:
        raise UserError("no candidate models to run: the sparse path is empty")
    if not tolerance >= 0:
        raise OptionError(f"the selection tolerance must be >= 0, got {tolerance}")
    records = []
    for done, cand in enumerate(candidates):
        if progress is not None:
            progress(PHASE, done, len(candidates))
        records.append(run_candidate(base, cand, initial, reference,
                                     long_duration=long_duration, spinup=spinup,
                                     **simulate_options))
    if progress is not None:
        progress(PHASE, len(candidates), len(candidates))
    return conclude(base, candidates, records, long_duration=long_duration, spinup=spinup,
                    tolerance=tolerance)


#: the progress phase of the candidates' coarse runs
PHASE = "coarse runs"


def _plain(obj):
    from closure.les import _finite

    return _finite(obj)


def input_options(spec) -> dict:
    """The coarse solver's input options (closure.les.simulate) from a job spec's input."""
    inp = spec.input
    if inp.levels is not None and (inp.levels == "all" or len(inp.levels) != 1):
        raise OptionError("selection by coarse runs runs one 2-D level: give one level "
                          "(input.levels / --levels), e.g. 0")
    return {"variables": dict(inp.variables), "group": inp.group, "mask": inp.mask,
            "levels": inp.levels, "spacing": inp.spacing}


def initial_path(spec, plan: Mapping | None = None) -> str:
    """The file the candidates start from and are compared with: the job's first input
    (resolved as the plan read it, when a plan is given)."""
    if plan is not None:
        inp = plan.get("input") or {}
        paths = inp.get("paths") or ([inp["path"]] if inp.get("path") else [])
        if paths:
            return str(paths[0])
    paths = spec.input.paths
    if not paths:
        raise UserError("selection by coarse runs needs the input file's path")
    return paths[0]


def plan_from_stats(spec, plan: Mapping, stats: Mapping, *,
                    transfer_weights: Sequence[float] = (0.0, 1.0),
                    max_per_path: int | None = 4) -> list[Candidate]:
    """The candidates of a mapped job (pure given the statistics): the sparse paths at
    ``transfer_weights`` fitted on the plan's training snapshots (closure.regression.
    fit_closure, as the reduce fits), one candidate per support (:func:`plan_candidates`),
    each with its held-out a priori scores under ``apriori["test"]``."""
    from closure.regression import fit_closure

    if not transfer_weights or any(not (w >= 0) for w in transfer_weights):
        raise OptionError(f"transfer weights must be >= 0, got {list(transfer_weights)}")
    train = [int(i) for i in plan["train"]]
    stats = {int(k): v for k, v in stats.items()}
    fits = {float(w): fit_closure(stats, train, spec.fit.method, transfer_weight=float(w),
                                  n_folds=spec.fit.folds, resamples=0, seed=spec.fit.seed,
                                  rule=spec.fit.selection)
            for w in dict.fromkeys(float(w) for w in transfer_weights)}
    return with_test_scores(plan_candidates(fits, max_per_path), plan, stats)


def with_test_scores(candidates: Sequence[Candidate], plan: Mapping, stats: Mapping
                     ) -> list[Candidate]:
    """The candidates with their held-out a priori scores (the plan's test snapshots'
    statistics) under ``apriori["test"]``."""
    from closure.pipeline import _flat_scores
    from closure.scores import prediction_scores
    from closure.stats import SufficientStats

    stats = {int(k): v for k, v in stats.items()}
    test_stats = SufficientStats.merge([stats[int(i)] for i in sorted(plan["test"])])
    out = []
    for c in candidates:
        scores = _flat_scores(prediction_scores(test_stats, np.asarray(c.coefficients)))
        out.append(Candidate(c.label, c.transfer_weight, c.parameter, c.coefficients,
                             c.terms, _plain({**c.apriori, "test": scores})))
    return out


#: the library term of an eddy-viscosity companion: tau_ij = coefficient D^2 |S| S_ij
EDDY_TERM = "smagorinsky"
#: the label suffix of an eddy-viscosity companion
EDDY_SUFFIX = "+eddy"


def eddy_companions(base, candidates: Sequence[Candidate], snapshots, grid, delta: float,
                    test_ratio: float = 2.0) -> list[Candidate]:
    """Dynamic mixed companions of the candidates (pure given the coarse ``snapshots``).

    A stress candidate fitted a priori matches the filter's subgrid stress, not the transfer
    the coarse solver's truncation also needs, and can pile energy up at the grid scale in a
    long run. For each candidate without the library's eddy-viscosity term (``EDDY_TERM``),
    the companion adds it with the coefficient ``-2 C`` of the dynamic mixed model (Zang,
    Street & Koseff 1993), ``C`` from the Germano identity on the resolved ``snapshots``
    (:func:`closure.les.dynamic_mixed_constant`, one constant for all of them); none when
    ``C <= 0`` (the data ask for no extra dissipation) or the library lacks the term. The
    companion is fixed before any coarse run: the runs decide whether it is kept.
    """
    from closure.les import dynamic_mixed_constant

    names = tuple(base.library.names)
    if EDDY_TERM not in names or getattr(base, "target", "stress") != "stress":
        return []
    k = names.index(EDDY_TERM)
    out = []
    for c in candidates:
        if c.coefficients[k] != 0.0:
            continue
        constant = dynamic_mixed_constant(candidate_model(base, c), snapshots, grid, delta,
                                          test_ratio)
        if not constant > 0:
            continue
        coefs = list(c.coefficients)
        coefs[k] = -2.0 * constant
        out.append(Candidate(c.label + EDDY_SUFFIX, c.transfer_weight, c.parameter,
                             tuple(coefs), c.terms,
                             {"companion_of": c.label, "germano_constant": constant}))
    return out


def companions_for(spec, plan: Mapping, stats: Mapping, base, candidates: Sequence[Candidate],
                   initial, options: Mapping | None = None) -> list[Candidate]:
    """:func:`eddy_companions` of a job's candidates, the Germano constant taken over the
    training snapshots of the file ``initial`` (coarse-grained as the model was), each with
    its held-out a priori scores."""
    from closure.les import _open_input, coarse_data, model_filter

    f = model_filter(base) or {"kind": "gaussian", "ratio": 4, "width": None}
    src, _ = _open_input(initial, options)
    with src:
        count = len(src)
    # the training snapshots that lie in this file (all of it when none does)
    train = [i for i in sorted(int(i) for i in plan["train"]) if i < count]
    data = coarse_data(initial, f["kind"], f["ratio"], f["width"], "grid",
                       train or None, options)
    companions = eddy_companions(base, candidates, data.fields, data.grid, data.delta)
    return with_test_scores(companions, plan, stats) if companions else []


def discover_and_select(spec, *, long_duration: float | None = None,
                        spinup: float | None = None,
                        transfer_weights: Sequence[float] | None = None,
                        max_per_path: int | None = None, tolerance: float | None = None,
                        initial=None, reference=None, companions: bool = True,
                        progress: Callable[[str, int, int], None] | None = None,
                        **simulate_options):
    """Discovery with selection by coarse runs, in process (``discover --select aposteriori``).

    Plans and maps the job ``spec`` (closure.pipeline), fits the a priori model (reduce), then
    the candidates (:func:`plan_from_stats`) and runs them long from ``initial`` (default:
    the job's input file), against ``reference`` (default: the same), with
    :func:`select_by_coarse_runs`; with ``companions`` the candidates' dynamic mixed
    companions (:func:`companions_for`) run too. Options left None come from ``spec.fit`` (duration,
    spinup, transfer_weights, max_candidates, tolerance). Returns (a priori model, Selection,
    chosen model or None).
    """
    from closure.pipeline import map_snapshot, plan, reduce

    f = spec.fit
    long_duration = f.duration if long_duration is None else long_duration
    if long_duration is None:
        raise OptionError("selection by coarse runs needs a run length: --duration T")
    spinup = f.spinup if spinup is None else spinup
    transfer_weights = tuple(f.transfer_weights if transfer_weights is None
                             else transfer_weights)
    max_per_path = f.max_candidates if max_per_path is None else max_per_path
    tolerance = f.tolerance if tolerance is None else tolerance
    if not transfer_weights or any(not (w >= 0) for w in transfer_weights):
        raise OptionError(f"transfer weights must be >= 0, got {list(transfer_weights)}")
    # map once with the transfer statistics when a positive weight needs them
    top = max(float(w) for w in transfer_weights)
    has = spec.fit.transfer_weight > 0 or (f.select == "aposteriori"
                                           and max(f.transfer_weights) > 0)
    mapping = spec if top <= 0 or has else spec.model_copy(
        update={"fit": spec.fit.model_copy(update={"transfer_weight": top})})
    p = plan(mapping)
    indices = sorted(p["snapshots"])
    stats = {}
    for done, i in enumerate(indices):
        if progress is not None:
            progress("map", done, len(indices))
        stats[i] = map_snapshot(mapping, p, i)
    apriori_model = reduce(spec, p, stats, progress)
    candidates = plan_from_stats(spec, p, stats, transfer_weights=transfer_weights,
                                 max_per_path=max_per_path)
    if "input_options" not in simulate_options:
        simulate_options["input_options"] = input_options(spec)
    source = initial if initial is not None else initial_path(spec, p)
    if companions:
        candidates += companions_for(spec, p, stats, apriori_model, candidates, source,
                                     simulate_options["input_options"])
    selection, chosen = select_by_coarse_runs(
        apriori_model, candidates, source, reference, long_duration=long_duration,
        spinup=spinup, tolerance=tolerance, progress=progress, **simulate_options)
    return apriori_model, selection, chosen
