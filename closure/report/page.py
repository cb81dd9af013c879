"""The self-contained HTML report of one model: ``index.html`` plus PNG figures in one folder.

Everything the page shows is in the folder (relative links, inline CSS, no scripts, no external
assets), so it can be zipped, mailed or served as static files. The folder is built next to its
destination and renamed into place.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import html
import json
import math
import os
import shutil
import tempfile
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from closure.errors import UserError
from closure.report import plots
from closure.report.aposteriori import AposterioriRuns, as_runs
from closure.report.apriori import AprioriData, apriori_data, reference_network_of
from closure.units import NOT_RECORDED, Units, label, model_units, run_units

#: The caution every report carries, verbatim.
CAUTION = ("A priori skill does not guarantee a stable or accurate coarse simulation: "
           "validate the model a posteriori in your own solver before relying on it.")

#: What the report says under the scores when the model carries a reference network.
_NETWORK_NOTE = ("<p><code>reference_net_test</code>: a small convolutional network trained "
                 "on the same training snapshots and inputs (resolved velocity gradients) and "
                 "scored on the same held-out snapshots. It has no closed form; the gap "
                 "between its scores and the model's is how much skill the closed form leaves "
                 "on the table. A priori skill of either does not guarantee a stable or "
                 "accurate coarse simulation.</p>")

#: Name of the marker file that says a folder is a report we may replace.
MARKER = ".closure-report"

_CSS = """
body { font-family: system-ui, sans-serif; max-width: 60rem; margin: 2rem auto; padding: 0 1rem;
       color: #1b1b1b; line-height: 1.45; }
h1 { font-size: 1.6rem; } h2 { font-size: 1.25rem; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.5rem 0 1rem; }
th, td { border: 1px solid #ccc; padding: 0.25rem 0.6rem; text-align: right; }
th:first-child, td:first-child { text-align: left; }
th { background: #f2f2f2; }
code { background: #f4f4f4; padding: 0 0.2rem; }
.caution { border-left: 6px solid #c0392b; background: #fdecea; padding: 0.6rem 1rem; }
.warnings li { color: #8a4b00; }
figure { margin: 1rem 0; } figcaption { font-size: 0.9rem; color: #555; }
img { max-width: 100%; height: auto; border: 1px solid #ddd; }
"""


# ------------------------------------------------------------------ reading a model


def _get(obj, name, default=None):
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


def _model_dict(model) -> dict:
    if isinstance(model, Mapping):
        return dict(model)
    to_dict = getattr(model, "to_dict", None)
    return dict(to_dict()) if callable(to_dict) else {}


def term_rows(model) -> list[dict]:
    """One plain dict per term: name, coefficient, coefficient_scaled, std_error,
    std_error_scaled, selection_frequency, delta_power, active, scaled_units (the library's
    exponents of length, time and scalars; None where unknown).

    Read from the model file's records (``to_dict()["terms"]``) when the model has them,
    else from ``model.terms`` items (dicts or objects with those attributes).
    """
    records = _model_dict(model).get("terms")
    if not records:
        records = _get(model, "terms", None) or []
    rows = []
    for t in records:
        row = {"name": str(t if isinstance(t, str) else _get(t, "name"))}
        for key in ("coefficient", "coefficient_scaled", "std_error", "std_error_scaled",
                    "selection_frequency", "delta_power", "active", "scaled_units"):
            row[key] = None if isinstance(t, str) else _get(t, key)
        if row["scaled_units"] is None and not isinstance(t, str) \
                and _get(t, "dimensionless") is True:
            row["scaled_units"] = {}
        if row["active"] is None:
            row["active"] = row["coefficient_scaled"] != 0 or row["coefficient"] != 0
        if row["std_error_scaled"] is None and row["std_error"] is not None \
                and row["coefficient"] and row["coefficient_scaled"] is not None:
            # the scaling is one factor D^p, the same for the coefficient and its error
            row["std_error_scaled"] = abs(row["std_error"] * row["coefficient_scaled"]
                                          / row["coefficient"])
        rows.append(row)
    return rows


# ------------------------------------------------------------------ HTML helpers


def _fmt(v) -> str:
    if v is None:
        return "&ndash;"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int | np.integer):
        return str(int(v))
    if isinstance(v, float | np.floating):
        v = float(v)
        if not math.isfinite(v):
            return html.escape(str(v))
        return f"{v:.4g}"
    return html.escape(str(v))


def _table(header: list[str], rows: list[list]) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{_fmt(c)}</td>" for c in r) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _kv_table(d: Mapping) -> str:
    return _table(["", ""], [[k, _flat(v)] for k, v in d.items()]).replace(
        "<thead><tr><th></th><th></th></tr></thead>", "")


def _flat(v):
    if isinstance(v, Mapping):
        return ", ".join(f"{k}: {_plain(x)}" for k, x in v.items())
    if isinstance(v, list | tuple):
        return _short(_plain(x) for x in v)
    return v


def _plain(v) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def _short(values, n: int = 10) -> str:
    values = list(values)
    if len(values) <= n:
        return ", ".join(map(str, values))
    return (", ".join(map(str, values[:4])) + ", ..., " + ", ".join(map(str, values[-3:]))
            + f" ({len(values)})")


def flatten(d: Mapping, prefix: str = "") -> dict:
    """Nested mappings as one level with dotted keys: {"all": {"r2": 1}} -> {"all.r2": 1}."""
    out = {}
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, Mapping):
            out.update(flatten(v, key + "."))
        else:
            out[key] = v
    return out


def _scores_table(scores) -> str:
    """Scores as rows (dotted names) x split columns when split by train/test, else key/value."""
    if not scores:
        return "<p>No scores were stored with this model.</p>"
    splits = [k for k in ("train", "test") if isinstance(scores.get(k), Mapping)]
    splits += [k for k, v in scores.items() if isinstance(v, Mapping) and k not in splits]
    rest = {k: v for k, v in scores.items() if k not in splits}
    out = ""
    if splits:
        flat = {s: flatten(scores[s]) for s in splits}
        metrics: list[str] = []
        for s in splits:
            metrics += [m for m, v in flat[s].items()
                        if m not in metrics and not isinstance(v, list | tuple)]
        out = _table(["score"] + splits, [[m] + [flat[s].get(m) for s in splits]
                                          for m in metrics])
    return out + (_kv_table(rest) if rest else "")


def _figure(filename: str, caption: str, *units: str | None, note: str = "") -> str:
    """A figure with its caption; "(units not recorded)" is added once when any of ``units``
    (those the figure's axes need) is None; ``note`` follows."""
    if any(u is None for u in units):
        caption += f" ({NOT_RECORDED})"
    caption += note
    width, height = (int(round(s * plots.DPI)) for s in plots.FIGSIZE)
    return (f'<figure><img src="{html.escape(filename)}" width="{width}" height="{height}"'
            f' alt="{html.escape(caption)}">'
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


# ------------------------------------------------------------------ atomic folder


@contextlib.contextmanager
def _atomic_folder(out_dir: Path):
    """Yield a temporary folder beside ``out_dir``; on success it replaces ``out_dir``.

    An existing ``out_dir`` is replaced only when it is empty or a previous report (has the
    marker file), so a mistyped ``-o`` never deletes someone's data.
    """
    out_dir = Path(out_dir)
    if out_dir.exists():
        if not out_dir.is_dir():
            raise UserError(f"{out_dir} exists and is not a folder: choose another output folder")
        if any(out_dir.iterdir()) and not (out_dir / MARKER).exists():
            raise UserError(f"{out_dir} exists and is not a closure report: choose a new or "
                            "empty output folder")
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", suffix=".tmp", dir=out_dir.parent))
    try:
        yield tmp
        (tmp / MARKER).write_text("closure report folder; replaced when the report is rebuilt\n")
        os.chmod(tmp, 0o755)
        if out_dir.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", suffix=".old",
                                        dir=out_dir.parent))
            os.replace(out_dir, old / "report")
            os.replace(tmp, out_dir)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, out_dir)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


# ------------------------------------------------------------------ sections


def _units_text(base: Units) -> str:
    """The base units in words, e.g. "length m, velocity m s-1, time s"."""
    parts = [f"{name} {value if value is not None else 'not recorded'}"
             for name, value in (("length", base.length), ("velocity", base.velocity),
                                 ("time", base.time))]
    parts += [f"{c} {u}" for c, u in base.scalars.items()]
    return ", ".join(parts) + " (the input's units attributes)"


def _with_units(value, units: str | None):
    """A number followed by its units, or by "(units not recorded)"."""
    if value is None:
        return None
    text = _plain(float(value)) if isinstance(value, int | float) else str(value)
    if units is None:
        return f"{text} ({NOT_RECORDED})"
    return text if units == "1" else f"{text} {units}"


def _summary_section(model, mdict, base: Units | None = None) -> str:
    from closure.report.provenance import provenance_input

    base = base or Units()
    filt = dict(_get(model, "filter", None) or mdict.get("filter") or {})
    prov = dict(_get(model, "provenance", None) or mdict.get("provenance") or {})
    library = mdict.get("library")
    grid = mdict.get("grid") or {}
    info = provenance_input(model) if prov else {}
    snaps = prov.get("snapshots") if isinstance(prov.get("snapshots"), Mapping) else {}
    inp = prov.get("input") if isinstance(prov.get("input"), Mapping) else {}
    train = snaps.get("train", inp.get("train"))
    summary = {
        "target": _get(model, "target"),
        "components": mdict.get("components"),
        "filter": filt.get("kind"),
        "filter width D": _with_units(_get(model, "delta") or filt.get("width"),
                                      base.of("length")),
        "filter width (fine spacings)": filt.get("width_cells"),
        "coarsening ratio": filt.get("ratio"),
        "coarse grid": " x ".join(map(str, grid.get("shape", []))) + (
            f" ({', '.join(grid.get('dims', []))}), spacing "
            f"{', '.join(f'{h:.4g}' for h in grid.get('spacing', []))}"
            f" {base.length or '(' + NOT_RECORDED + ')'}" if grid else ""),
        "units": _units_text(base),
        "derivative scheme": _get(model, "scheme"),
        "library": library.get("name") if isinstance(library, Mapping) else library,
        "fit method": mdict.get("method"),
        "input file": info.get("path"),
        "input sha256": info.get("sha256"),
        "training snapshots": train,
        "held-out snapshots": info.get("test"),
        "created": prov.get("created"),
        "closure version": prov.get("closure_version"),
    }
    summary = {k: v for k, v in summary.items() if v not in (None, "", {}, [])}
    return "<h2>Model</h2>" + _kv_table(summary)


def _term_units(base: Units, row: dict, scaled: bool) -> str | None:
    return base.coefficient(row.get("scaled_units"), 0.0 if scaled else
                            float(row.get("delta_power") or 0.0))


def _units_cell(units: str | None) -> str:
    if units is None:
        return f"<td>{NOT_RECORDED}</td>"
    return "<td>dimensionless</td>" if units == "1" else f"<td>{html.escape(units)}</td>"


def _terms_section(all_rows: list[dict], base: Units | None = None) -> str:
    base = base or Units()
    rows = [r for r in all_rows if r["active"]]
    inactive = [r["name"] for r in all_rows if not r["active"]]
    rest = ("<p>Terms not selected: " + ", ".join(f"<code>{html.escape(n)}</code>"
                                                  for n in inactive) + ".</p>") if inactive else ""
    if not rows:
        return ("<h2>Terms</h2><p>No term was selected: the model predicts zero.</p>" + rest)
    body = []
    for r in rows:
        coef = _fmt(r["coefficient"])
        if r["std_error"] is not None:
            coef += f" &plusmn; {_fmt(r['std_error'])}"
        scaled = _fmt(r["coefficient_scaled"])
        if r["std_error_scaled"] is not None:
            scaled += f" &plusmn; {_fmt(r['std_error_scaled'])}"
        body.append(f"<tr><td><code>{html.escape(r['name'])}</code></td><td>{coef}</td>"
                    f"{_units_cell(_term_units(base, r, False))}"
                    f"<td>{_fmt(r['delta_power'])}</td><td>{scaled}</td>"
                    f"{_units_cell(_term_units(base, r, True))}"
                    f"<td>{_fmt(r['selection_frequency'])}</td></tr>")
    head = ("<tr><th>term</th><th>coefficient c &plusmn; std error</th><th>units of c</th>"
            "<th>power p of D (dimensionless)</th>"
            "<th>scaled coefficient (c / D<sup>p</sup>) &plusmn; std error</th>"
            "<th>units of c / D<sup>p</sup></th>"
            "<th>selection frequency (dimensionless)</th></tr>")
    return (f"<h2>Terms</h2><table><thead>{head}</thead><tbody>{''.join(body)}</tbody></table>"
            + rest +
            "<p>The coefficient multiplies the term with D = 1 (dimensional); the scaled "
            "coefficient is it divided by the filter width D to the term's power p, so it is "
            "comparable across resolutions. The selection frequency is the share of resamples "
            "in which the term was kept.</p>")


def _collect_warnings(model, mdict, extra) -> list[str]:
    out = []
    for w in list(_get(model, "warnings", None) or mdict.get("warnings") or []) + list(extra):
        text = w if isinstance(w, str) else (_get(w, "message") or json.dumps(w, default=str))
        if text not in out:
            out.append(str(text))
    return out



# ------------------------------------------------------------------ the entry point


def write_report(model, out_dir: str | os.PathLike, coarse_test_snapshots=None,
                 les_result=None, sweep=None, *, apriori: AprioriData | None = None,
                 title: str | None = None, extra_warnings=(), notes=()) -> Path:
    """Write the report folder of ``model`` to ``out_dir`` and return the folder's path.

    ``model``: a ClosureModel (or anything with its attributes; a dict is read for the summary
    and terms only). ``coarse_test_snapshots``: held-out CoarseSnapshots to score against (or
    an already computed ``apriori``); ``les_result``: the a posteriori result of
    :func:`closure.les` (object or its JSON dict); ``sweep``: a
    :class:`closure.sweep.SweepResult` or its dict. Sections whose data is missing are left
    out and say so. The folder holds ``index.html``, the PNGs, ``report.json`` (the numbers
    behind the figures) and a marker file; it is built beside ``out_dir`` and renamed into
    place, replacing an earlier report there.
    """
    out_dir = Path(out_dir)
    mdict = _model_dict(model)
    rows = term_rows(model)
    note_items = list(notes)
    if apriori is None and coarse_test_snapshots is not None:
        if not callable(getattr(model, "evaluate", None)):
            from closure.model import ClosureModel

            model = ClosureModel.from_dict(mdict)
        apriori = apriori_data(model, coarse_test_snapshots,
                               network=reference_network_of(model, note_items))
    runs = as_runs(les_result) if les_result is not None else None
    sweep_dict = _sweep_dict(sweep) if sweep is not None else None
    warnings = _collect_warnings(model, mdict, extra_warnings)
    base = model_units(model)
    numbers: dict = {"model_id": mdict.get("id"), "target": _get(model, "target"),
                     "terms": rows, "scores": _get(model, "scores", None) or {},
                     "warnings": warnings, "caution": CAUTION, "units": base.to_dict()}
    sections: list[str] = []

    with _atomic_folder(out_dir) as tmp:
        sections.append(_summary_section(model, mdict, base))
        sections.append(_terms_section(rows, base))
        active = [r for r in rows if r["active"]]
        if active:
            coef_units = [_term_units(base, r, True) for r in active]
            fig = plots.coefficients([r["name"] for r in active],
                                     [r["coefficient_scaled"] if r["coefficient_scaled"]
                                      is not None else r["coefficient"] or 0.0 for r in active],
                                     [r["std_error_scaled"] for r in active],
                                     [r["selection_frequency"] for r in active],
                                     units=coef_units)
            plots.save_png(fig, tmp / "coefficients.png")
            sections.append(_figure("coefficients.png",
                                    "Scaled coefficients with one standard error, and how "
                                    "often each term was selected", *coef_units))

        sections.append("<h2>A priori scores</h2>" + _scores_table(numbers["scores"])
                        + "<p>The scores (R<sup>2</sup>, correlations, relative errors and "
                          "ratios) are dimensionless.</p>")
        if isinstance(numbers["scores"], Mapping) and "reference_net_test" in numbers["scores"]:
            sections.append(_NETWORK_NOTE)
        if apriori is not None:
            sections.append(_apriori_section(apriori, tmp, base, _get(model, "target", "")))
            numbers["apriori"] = apriori.to_dict()
            note_items += apriori.notes
        else:
            sections.append("<p>No held-out snapshots were given, so the pointwise and "
                            "spectral a priori comparisons are left out (build the report with "
                            "the input file to include them).</p>")

        sections.append("<h2>Warnings</h2>" + (
            '<ul class="warnings">' + "".join(f"<li>{html.escape(w)}</li>" for w in warnings)
            + "</ul>" if warnings else "<p>None.</p>"))

        if sweep_dict is not None:
            text, spreads = _sweep_section(sweep_dict, tmp, base, rows)
            sections.append(text)
            numbers["sweep"] = {"delta": [e.get("delta") for e in sweep_dict["entries"]],
                                "spread": spreads}
        if runs is not None:
            raw = _raw_result(les_result)
            run_base = run_units(raw, base)
            text, coincide = _aposteriori_section(runs, tmp, run_base, raw)
            sections.append(text)
            numbers["aposteriori"] = runs.summary()
            numbers["aposteriori"]["units"] = run_base.to_dict()
            numbers["aposteriori"]["coinciding"] = coincide
            long_text, long_numbers = long_run_section(runs, tmp, run_base, raw)
            if long_text:
                sections.append(long_text)
                numbers["aposteriori"]["long_runs"] = long_numbers
        selection = (mdict.get("settings") or {}).get("aposteriori_selection")
        if isinstance(selection, Mapping) and selection.get("candidates"):
            sections.append(selection_section(selection, tmp))
            numbers["selection"] = {k: selection.get(k) for k in
                                    ("rule", "tolerance", "chosen", "settings")}
        if note_items:
            sections.append("<h2>Notes</h2><ul>" + "".join(
                f"<li>{html.escape(str(n))}</li>" for n in note_items) + "</ul>")

        heading = title or f"Closure report: {_get(model, 'target', 'model')}" + (
            f" ({mdict['id']})" if mdict.get("id") else "")
        stamp = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
        page = ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
                f"<title>{html.escape(heading)}</title>"
                "<meta name=\"generator\" content=\"closure report\">"
                f"<style>{_CSS}</style></head><body>"
                f"<h1>{html.escape(heading)}</h1>"
                f'<p class="caution"><strong>Caution.</strong> {html.escape(CAUTION)}</p>'
                + "".join(sections)
                + f"<hr><p><small>Written {stamp} by closure.</small></p></body></html>\n")
        (tmp / "index.html").write_text(page, encoding="utf-8")
        (tmp / "report.json").write_text(json.dumps(_jsonable(numbers), indent=1),
                                         encoding="utf-8")
    return out_dir


def _jsonable(x):
    if isinstance(x, Mapping):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return _jsonable(x.tolist())
    if isinstance(x, np.generic):
        x = x.item()
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if x is None or isinstance(x, str | int | float | bool):
        return x
    return str(x)


def _transfer_units(base: Units, name: str, target: str) -> str | None:
    """Units of a transfer spectrum per shell: energy (pi), enstrophy, scalar variance."""
    if name == "energy":
        return base.of("energy_transfer")
    if name == "enstrophy":
        return base.of("enstrophy_transfer")
    c = target.split(":", 1)[1] if target.startswith("flux:") else None
    if name == "scalar" and c in base.scalars:
        return base.dims(0, -1, **{c: 2})
    return None


def _apriori_section(data: AprioriData, tmp: Path, base: Units | None = None,
                     target: str = "") -> str:
    base = base or Units()
    out = [f"<h2>A priori comparison on held-out snapshots</h2>"
           f"<p>Snapshots {', '.join(str(i) for i in data.snapshot_indices)}, all points "
           "pooled.</p>"]
    stats = data.agreement()
    net = data.network_agreement()
    if net is None:
        out.append(_table(["component", "units", "R^2 (dimensionless)",
                           "correlation (dimensionless)"],
                          [[n, base.component(n) or NOT_RECORDED, s["r2"], s["correlation"]]
                           for n, s in stats.items()]))
    else:
        out.append(_table(["component", "units", "R^2 (dimensionless)",
                           "correlation (dimensionless)", "network R^2",
                           "network correlation"],
                          [[n, base.component(n) or NOT_RECORDED, s["r2"], s["correlation"],
                            net.get(n, {}).get("r2"), net.get(n, {}).get("correlation")]
                           for n, s in stats.items()]))
    comp_units = {n: base.component(n) for n in data.exact}
    plots.save_png(plots.apriori_hexbin(data.exact, data.modelled, stats=stats,
                                        units=comp_units), tmp / "apriori_hexbin.png")
    out.append(_figure("apriori_hexbin.png", "Exact vs modelled subgrid term per component "
                       "(hexbin of point counts, log scale; red: 1:1 line)",
                       *comp_units.values()))
    if net is not None:
        plots.save_png(plots.apriori_hexbin(data.exact, data.network, stats=net,
                                            units=comp_units),
                       tmp / "apriori_hexbin_network.png")
        out.append(_figure("apriori_hexbin_network.png", "The same for the neural reference "
                           "network (trained on the same snapshots): how much skill the closed "
                           "form leaves on the table", *comp_units.values()))
    for t in data.transfers:
        name = f"transfer_{t.name}.png"
        curves = {"exact": t.exact, "model": t.model}
        un = _transfer_units(base, t.name, target)
        ku = base.of("wavenumber")
        suffix = "" if un is None else ("" if un == "1" else f" {un}")
        totals = f"exact {t.exact.sum():.4g}{suffix}, model {t.model.sum():.4g}{suffix}"
        if t.network is not None:
            curves["reference network"] = t.network
            totals += f", reference network {t.network.sum():.4g}{suffix}"
        fig = plots.transfer_spectra(t.k, curves, f"Subgrid {t.label}: exact vs model",
                                     t.label, k_units=ku, units=un)
        plots.save_png(fig, tmp / name)
        out.append(_figure(name, f"Subgrid {t.label} by shell, averaged over the held-out "
                           f"snapshots; positive: drained to the subgrid scales. Totals: "
                           f"{totals}", ku, un))
    if data.transfers:
        out.append("<p>Transfer spectra are shell sums of Re(conj(u&#770;<sub>i</sub>) "
                   "f&#770;<sub>i</sub>)/N<sup>2</sup> between the resolved velocity and the "
                   "subgrid force f<sub>i</sub> = &part;<sub>j</sub>&tau;<sub>ij</sub> (and of "
                   "the vorticity with the vorticity forcing); each sums to the domain mean of "
                   "the pointwise transfer.</p>")
    return "".join(out)


def _sweep_dict(sweep) -> dict:
    d = sweep.to_dict() if callable(getattr(sweep, "to_dict", None)) else dict(sweep)
    if not d.get("entries"):
        raise UserError("the sweep result has no entries: run the sweep with at least one width")
    return d


#: Held-out scores drawn against the filter width, when the sweep has them.
SWEEP_SCORES = ("r2", "correlation", "relative_error", "energy_transfer_correlation",
                "enstrophy_transfer_correlation", "scalar_variance_transfer_correlation")


def _sweep_section(sweep: dict, tmp: Path, base: Units | None = None,
                   rows_of_model: list[dict] | None = None) -> tuple[str, dict]:
    """The sweep's HTML and the spread of each term's scaled coefficient across widths."""
    from closure.sweep import selected_coefficients

    entries = sorted(sweep["entries"], key=lambda e: e["delta"])
    base = base or Units()
    first_model = entries[0].get("model")
    if isinstance(first_model, Mapping) and first_model.get("grid"):
        own = model_units(first_model)  # the sweep's own record first, then the model's
        base = Units(own.length or base.length, own.velocity or base.velocity,
                     own.time or base.time, {**base.scalars, **own.scalars})
    length = base.of("length")
    delta = [e["delta"] for e in entries]
    scaled, errors = selected_coefficients(entries)
    names = list(scaled)
    known = {r["name"]: r.get("scaled_units") for r in rows_of_model or []}
    for e in entries:
        for n, t in (e.get("terms") or {}).items():
            if isinstance(t, Mapping) and "scaled_units" in t:
                known[n] = t["scaled_units"]
            elif isinstance(t, Mapping) and t.get("dimensionless") is True:
                known[n] = {}
    units = {n: base.coefficient(known[n]) if n in known else None for n in names}
    spreads = {n: plots.spread(scaled[n]) for n in names}
    out = ["<h2>Filter-width sweep</h2>",
           "<p>The same data, library and fit at each filter width D. Scaled coefficients "
           "(c / D<sup>p</sup>); blank where the term was not selected. The spread is "
           "(largest &minus; smallest) / |mean| of a term's scaled coefficient over the "
           "widths where it was selected.</p>"]
    rows = [[e["delta"], e.get("width_cells"), e.get("ratio")] + [
        None if math.isnan(scaled[n][k]) else scaled[n][k] for n in names]
        for k, e in enumerate(entries)]
    rows.append(["spread", None, None] + [
        f"{spreads[n]:.1%}" if math.isfinite(spreads[n]) else None for n in names])
    out.append(_table([label("D", length), "D (fine spacings)", "ratio"]
                      + [n + (f" ({NOT_RECORDED})" if units[n] is None else
                              " (dimensionless)" if units[n] == "1" else f" ({units[n]})")
                         for n in names], rows))
    if names:
        plots.save_png(plots.sweep_coefficients(delta, scaled, errors, units=units,
                                                length_units=length),
                       tmp / "sweep_coefficients.png")
        words = "; ".join(f"{n} {spreads[n]:.1%}" for n in names if math.isfinite(spreads[n]))
        out.append(_figure("sweep_coefficients.png", "Scaled coefficient of each term vs filter "
                           "width D, +/- one standard error, one panel per term on its own "
                           "axis (which includes 0, so a drift shows in proportion to the "
                           "coefficient's size); a closure whose D-scaling is right gives flat "
                           "lines." + (f" Spread across widths: {words}." if words else ""),
                           length, *units.values()))
    available = [n for n in SWEEP_SCORES
                 if any(isinstance((e.get("test_scores") or {}).get(n), int | float)
                        for e in entries)]
    if not available:  # scores under other names: the numeric ones, at most six
        for e in entries:
            available += [n for n, v in (e.get("test_scores") or {}).items()
                          if isinstance(v, int | float) and n not in available]
        available = available[:6]
    if available:
        series = {n: [_num_or_nan((e.get("test_scores") or {}).get(n)) for e in entries]
                  for n in available}
        plots.save_png(plots.sweep_scores(delta, series, length_units=length),
                       tmp / "sweep_scores.png")
        out.append(_figure("sweep_scores.png", "Held-out a priori scores (dimensionless) vs "
                           "filter width D", length))
    return "".join(out), {n: (v if math.isfinite(v) else None) for n, v in spreads.items()}


def _num_or_nan(v) -> float:
    return float(v) if isinstance(v, int | float) and not isinstance(v, bool) else math.nan


def _raw_result(les_result) -> dict:
    """The a posteriori result as its plain dict (diagnostics and settings included), or {}
    when only the report's own run data were given."""
    if isinstance(les_result, Mapping):
        return dict(les_result)
    to_dict = getattr(les_result, "to_dict", None)
    if callable(to_dict) and not isinstance(les_result, AposterioriRuns):
        return dict(to_dict())
    return {}


def dynamic_constant_text(name: str, constants) -> str:
    """What ``closure les`` prints about a dynamic run's Germano-Lilly constant."""
    c = [float(v) for v in constants]
    return (f"{name}: Germano-Lilly C = C_s^2 from {min(c):.3g} to {max(c):.3g} "
            "(negative values clipped to 0)")


def coincidence_notes(curves: Mapping[str, tuple], raw: Mapping | None = None
                      ) -> list[tuple[list[str], str, str]]:
    """For each group of runs whose curves coincide (:func:`plots.coinciding`):
    ``(labels, short caption note, full note)`` saying so and, where the run data tell, why:
    a dynamic run whose Germano-Lilly constant stayed at or below 0 is clipped to C = 0, so
    it adds no subgrid stress and runs as the run without a model."""
    runs = (raw or {}).get("runs") if isinstance((raw or {}).get("runs"), Mapping) else {}
    out = []
    for group, worst in plots.coinciding(curves):
        quoted = [f"'{g}'" for g in group]
        names = ", ".join(quoted[:-1]) + " and " + quoted[-1]
        how = "identical" if worst == 0 else f"equal to {worst:.1g} of their largest value"
        short = f" {names} coincide ({how}; distinct line styles and markers)"
        full = f"In these runs {names} are {how}, so their lines coincide"
        why, short_why = [], []
        for g in group:
            diag = (runs.get(g) or {}).get("diagnostics") or {}
            c = diag.get("dynamic_constant") if isinstance(diag, Mapping) else None
            if c and max(c) <= 0:
                why.append(dynamic_constant_text(g, c) + ": at or below 0 throughout, so "
                           "it is clipped to C = 0, adds no subgrid stress and runs as the run "
                           "without a model")
                short_why.append(f"'{g}' has its dynamic constant clipped to 0 throughout")
            elif c:
                why.append(dynamic_constant_text(g, c))
        out.append((group, short + (": " + "; ".join(short_why) if short_why else "") + ".",
                    full + (". Why: " + "; ".join(why) if why else "") + "."))
    return out


def _aposteriori_section(runs: AposterioriRuns, tmp: Path, base: Units | None = None,
                         raw: Mapping | None = None) -> tuple[str, list[dict]]:
    """The a posteriori HTML and the groups of coinciding runs (with the note shown)."""
    from closure.report.aposteriori import METRICS

    base = base or Units()
    t_units = base.time or base.of("time")
    e_units, z_units = base.of("energy"), base.of("enstrophy")
    out = ["<h2>A posteriori: coarse runs</h2>",
           "<p>The model and the baselines run in the coarse solver from the same filtered "
           "initial state" + (f", against the filtered fine-grid data (run <code>"
                              f"{html.escape(runs.reference)}</code>)" if runs.reference
                              else "")
           + ". Errors are time means of relative errors against the reference (PDF "
           "distance: Hellinger distance of the vorticity PDFs); both are dimensionless.</p>"]
    metric_names = [m for m in METRICS if any(m in r.metrics for r in runs.runs.values())]
    rows = [[label_, r.status, r.blowup_time if r.blowup_time is not None else "none",
             r.final("energy"), r.final("enstrophy")] + [r.metrics.get(m) for m in metric_names]
            for label_, r in runs.runs.items()]
    out.append(_table(["run", "status", label("blow-up time", t_units) if t_units else
                       f"blow-up time ({NOT_RECORDED})",
                       label("final kinetic energy", e_units) if e_units else
                       f"final kinetic energy ({NOT_RECORDED})",
                       label("final enstrophy", z_units) if z_units else
                       f"final enstrophy ({NOT_RECORDED})"]
                      + [label(METRICS[m], "1") for m in metric_names], rows))
    notes: dict[str, list[tuple[list[str], str, str]]] = {}
    spectra_curves = {lab: r.spectrum for lab, r in runs.runs.items() if r.spectrum}
    if spectra_curves:
        ku, eu = base.of("wavenumber"), base.of("energy_spectrum")
        notes["spectrum"] = coincidence_notes(spectra_curves, raw)
        plots.save_png(plots.aposteriori_spectra(spectra_curves, runs.reference, k_units=ku,
                                                 units=eu),
                       tmp / "aposteriori_spectra.png")
        out.append(_figure("aposteriori_spectra.png", "Energy spectra of the coarse runs and of "
                           "the filtered reference" + (f" (at t = {runs.spectrum_time:.4g}"
                                                       f"{' ' + t_units if t_units else ''})"
                                                       if runs.spectrum_time is not None
                                                       else "") + ".",
                           ku, eu, note=_notes_text(notes["spectrum"])))
    blowup = {lab: r.blowup_time for lab, r in runs.runs.items()}
    for key, what, log, un in (("energy", "kinetic energy", False, e_units),
                               ("enstrophy", "enstrophy", False, z_units)):
        series = {lab: (r.time, r.series[key]) for lab, r in runs.runs.items()
                  if key in r.series}
        if series:
            name = f"aposteriori_{key}.png"
            notes[key] = coincidence_notes(series, raw)
            plots.save_png(plots.time_series(series, what, blowup, runs.reference, log,
                                             time_units=t_units, units=un),
                           tmp / name)
            out.append(_figure(name, f"{what.capitalize()} of the coarse runs; dashed "
                               "vertical lines mark blow-up times.", t_units, un,
                               note=_notes_text(notes[key])))
    pdfs = {lab: r.vorticity_pdf for lab, r in runs.runs.items() if r.vorticity_pdf}
    if pdfs:
        wu, pu = base.of("vorticity"), base.of("vorticity_pdf")
        notes["vorticity_pdf"] = coincidence_notes(pdfs, raw)
        plots.save_png(plots.pdfs(pdfs, "vorticity", runs.reference, units=wu,
                                  density_units=pu), tmp / "vorticity_pdf.png")
        out.append(_figure("vorticity_pdf.png", "Probability density of the vorticity.",
                           wu, pu, note=_notes_text(notes["vorticity_pdf"])))
    seen: dict[tuple, str] = {}
    for groups in notes.values():
        for group, _, text in groups:
            seen.setdefault(tuple(group), text)
    if seen:
        out.append("<ul>" + "".join(f"<li>{html.escape(t)}</li>" for t in seen.values())
                   + "</ul>")
    coincide = [{"figure": fig, "runs": group, "note": text}
                for fig, groups in notes.items() for group, _, text in groups]
    return "".join(out), coincide


def _notes_text(groups: list[tuple[list[str], str, str]]) -> str:
    return "".join(short for _, short, _ in groups)


# ------------------------------------------------------------------ long runs and selection

#: what a long-run comparison shows, said under its table
LONG_RUN_TEXT = ("Each run continued for the stated time; its statistics after the spin-up "
                 "(time-mean energy spectrum, vorticity PDF, mean energy and enstrophy) are "
                 "compared with those of every filtered fine-grid snapshot. This is evidence "
                 "about this flow, this resolution and this run length: a run that stayed "
                 "stable here may still blow up longer, on another flow or at another "
                 "resolution, and a priori skill does not guarantee a stable or accurate "
                 "coarse simulation.")


def _long_records(runs: AposterioriRuns) -> dict[str, dict]:
    """The runs that were long runs (a ``stable`` figure), reference left out."""
    return {lab: r.long_run for lab, r in runs.runs.items()
            if lab != runs.reference and isinstance(r.long_run, Mapping)
            and "stable" in r.long_run}


def reference_band(runs: AposterioriRuns) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """(k, E_min, E_max): the range of the reference snapshots' energy spectra, when the
    result records it (``closure les --duration`` does)."""
    ref = runs.runs.get(runs.reference) if runs.reference else None
    spec = (((ref.long_run if ref is not None else None) or {}).get("statistics") or {}
            ).get("spectrum") or {}
    if not all(key in spec for key in ("k", "E_min", "E_max")):
        return None
    return tuple(np.asarray([math.nan if v is None else v for v in spec[key]], dtype=float)
                 for key in ("k", "E_min", "E_max"))


def cost_rows(raw: Mapping) -> tuple[list[list], str]:
    """Rows (run, wall seconds, steps, coarse points, coarse/fine cost) and a sentence on
    the fine run's cost: the coarse/fine ratio is given only when the input file states the
    fine run's wall-clock time (``wall_seconds``) and simulated time (``simulated_time``)."""
    settings = raw.get("settings") or {}
    shape = ((settings.get("grid") or {}).get("shape")) or []
    points = int(np.prod(shape)) if shape else None
    fine = settings.get("fine_cost") or {}
    long_settings = settings.get("long_run") or {}
    fine_rate = None
    if fine.get("wall_seconds") and fine.get("simulated_time"):
        fine_rate = float(fine["wall_seconds"]) / float(fine["simulated_time"])
    rows = []
    for lab, r in (raw.get("runs") or {}).items():
        if lab == raw.get("reference") or r.get("wall_seconds") is None:
            continue
        t = r.get("time") or []
        simulated = (r.get("long_run") or {}).get("reached")
        if simulated is None and len(t) > 1:
            simulated = float(t[-1]) - float(t[0])
        ratio = None
        if fine_rate and simulated:
            ratio = float(r["wall_seconds"]) / simulated / fine_rate
        rows.append([lab, r["wall_seconds"], r.get("steps"), points, ratio])
    if fine_rate:
        text = (f"The fine run took {fine['wall_seconds']:.4g} s of wall-clock time for "
                f"{fine['simulated_time']:.4g} s of simulated time (as its file states); the "
                "last column is the coarse run's wall-clock time per simulated second over "
                "the fine run's.")
    else:
        text = ("The input file does not state the fine run's wall-clock and simulated time, "
                "so the coarse/fine cost ratio is left out" + (
                    f"; the fine grid has {settings['fine_points']} points" if
                    settings.get("fine_points") else "") + ".")
    if long_settings.get("duration"):
        text += " Wall-clock times were measured on the machine that ran the comparison."
    return rows, text


def long_run_section(runs: AposterioriRuns, tmp: Path, base: Units | None = None,
                     raw: Mapping | None = None) -> tuple[str, dict]:
    """The long-run HTML (table, spectra with the reference band, vorticity PDFs on a log
    scale, a stability line per run, cost) and its numbers; ("", {}) without long runs."""
    records = _long_records(runs)
    if not records:
        return "", {}
    base = base or Units()
    t_units = base.time or base.of("time")
    out = ["<h2>A posteriori: long runs</h2>", f"<p>{html.escape(LONG_RUN_TEXT)}</p>"]
    rows = [[lab, "stable" if r.get("stable") else "blew up", r.get("duration"),
             r.get("blowup_time"), r.get("spectrum_error"), r.get("vorticity_pdf_distance"),
             r.get("mean_energy_ratio"), r.get("mean_enstrophy_ratio")]
            for lab, r in records.items()]
    out.append(_table(["run", "stability", label("duration", t_units), label("blow-up time",
                       t_units), "spectrum error (1)", "vorticity PDF distance (1)",
                       "mean energy / reference (1)", "mean enstrophy / reference (1)"], rows))
    spectra = runs.long_run_curves("spectrum")
    band = reference_band(runs)
    if spectra:
        ku, eu = base.of("wavenumber"), base.of("energy_spectrum")
        plots.save_png(plots.long_run_spectra(spectra, runs.reference, band, k_units=ku,
                                              units=eu), tmp / "long_run_spectra.png")
        out.append(_figure("long_run_spectra.png", "Time-mean energy spectra of the long runs "
                           "after the spin-up" + (", with the range of the reference "
                                                  "snapshots shaded" if band else "") + ".",
                           ku, eu))
    pdfs = runs.long_run_curves("vorticity_pdf")
    if pdfs:
        wu, pu = base.of("vorticity"), base.of("vorticity_pdf")
        fig = plots.pdfs(pdfs, "vorticity", runs.reference, units=wu, density_units=pu)
        fig.axes[0].set_title("Long runs: vorticity PDF after the spin-up (log scale)")
        plots.save_png(fig, tmp / "long_run_vorticity_pdf.png")
        out.append(_figure("long_run_vorticity_pdf.png", "Time-mean vorticity PDFs of the "
                           "long runs on a log density axis, tails included.", wu, pu))
    plots.save_png(plots.stability_lines(records, time_units=t_units),
                   tmp / "long_run_stability.png")
    out.append(_figure("long_run_stability.png", "Stability of each long run: stable for the "
                       "whole run, or the time it blew up.", t_units))
    numbers = {lab: {k: r.get(k) for k in ("stable", "duration", "blowup_time",
                                            "spectrum_error", "vorticity_pdf_distance",
                                            "mean_energy_ratio", "mean_enstrophy_ratio")}
               for lab, r in records.items()}
    if raw:
        cost, text = cost_rows(raw)
        if cost:
            out.append("<h3>Cost</h3>" + _table(
                ["run", "wall-clock time (s)", "steps", "coarse grid points",
                 "coarse / fine cost per simulated second"], cost) + f"<p>{html.escape(text)}</p>")
    return "".join(out), numbers


def selection_section(selection: Mapping, tmp: Path) -> str:
    """The candidates of a model chosen by coarse runs: the front (number of terms vs a
    priori error vs long-run score) and the table of every candidate."""
    chosen = selection.get("chosen")
    cands = list(selection.get("candidates") or [])
    plots.save_png(plots.selection_front(cands, chosen), tmp / "selection_front.png")
    rows = []
    for c in cands:
        f = c.get("long_run") or {}
        rows.append([c.get("label"), c.get("n_terms"), c.get("transfer_weight"),
                     ((c.get("apriori") or {}).get("test") or {}).get("relative_error"),
                     "stable" if f.get("stable") else "blew up", f.get("blowup_time"),
                     f.get("spectrum_error"), f.get("vorticity_pdf_distance"), c.get("score"),
                     "chosen" if c.get("label") == chosen else ""])
    settings = selection.get("settings") or {}
    head = (f"<p>Every candidate along the sparse paths ran {settings.get('long_duration', '?')}"
            f" s in the coarse solver (statistics after {settings.get('spinup', 0)} s). Rule: "
            f"{html.escape(str(selection.get('rule', '')))} (tolerance "
            f"{selection.get('tolerance')}). " + (
                f"Chosen: <code>{html.escape(str(chosen))}</code>." if chosen else
                "<strong>No candidate was stable: this model was not chosen by coarse runs."
                "</strong>") + "</p>")
    return ("<h2>Selection by coarse runs</h2>" + head
            + _figure("selection_front.png", "Number of terms against the a priori held-out "
                      "error and the long-run score (both dimensionless); x: blew up; "
                      "circled: chosen.")
            + _table(["candidate", "terms", "transfer weight", "a priori error (1)",
                      "stability", "blow-up time", "spectrum error (1)", "PDF distance (1)",
                      "score (1)", ""], rows)
            + f"<p>{html.escape(selection.get('note') or CAUTION)}</p>")
