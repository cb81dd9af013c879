"""Export a ClosureModel as JSON coefficients, or as Python, C or Fortran source.

All code is printed from the terms' sympy expressions (``sympy.pycode``-style numpy printer,
``sympy.ccode``, ``sympy.fcode``) after one common-subexpression pass (``sympy.cse``), so the
languages agree with each other and with ``ClosureModel.evaluate`` to round-off. The generated
functions are pointwise: they take the resolved derivatives of the filtered fields (named as in
closure.library, e.g. ``du_dx``, ``d2u_dxy``) and the filter width ``Delta``, and return the
modelled target components. Only active terms (non-zero coefficient) are included; each term's
Delta-scaled coefficient is a named constant ``coef_<term>``.
"""

from __future__ import annotations

import json
import re
import textwrap

import sympy

from closure.errors import UserError
from closure.library import DELTA, symbol_info
from closure.model import ClosureModel
from closure.units import NOT_RECORDED, Units, model_units

LANGUAGES = ("json", "python", "c", "fortran")
_IDENT = re.compile(r"^[A-Za-z][A-Za-z0-9_]{0,62}$")


def export_model(model: ClosureModel, lang: str, name: str = "closure_model") -> str:
    """Source text of ``model`` in ``lang`` ("json", "python", "c" or "fortran").

    ``name`` is the function (and, in Fortran, module ``<name>_mod``) name.
    """
    if lang not in LANGUAGES:
        raise UserError(f"unknown export language {lang!r}: choose {', '.join(LANGUAGES)}")
    if not _IDENT.match(name) or len(name) > 59:
        raise UserError(f"function name {name!r} must be an identifier of at most 59 "
                        "characters")
    if lang == "json":
        return _json(model)
    code = _Code(model, name)
    return {"python": code.python, "c": code.c, "fortran": code.fortran}[lang]()


def inputs(model: ClosureModel) -> list[str]:
    """Argument names of the exported functions (derivative symbols, then ``Delta``)."""
    return [s.name for s in _active_symbols(model)] + ["Delta"]


def _active_symbols(model):
    lib = model.library.subset([t.name for t in model.active_terms])
    return lib.symbols


def units_of(model: ClosureModel) -> dict:
    """Units of the exported quantities, from :func:`closure.units.model_units`: the base
    units, each input and output, and each active term's coefficients; None where not
    recorded, ``"1"`` where dimensionless."""
    base = model_units(model)
    return {
        "base": base.to_dict(),
        "inputs": {n: _input_units(n, base) for n in inputs(model)},
        "outputs": {c: base.component(c) for c in model.components},
        "coefficient_scaled": {t.name: base.coefficient(t.term.scaled_units)
                               for t in model.active_terms},
        "coefficient": {t.name: base.coefficient(t.term.scaled_units, t.delta_power)
                        for t in model.active_terms},
    }


def _input_units(name: str, base: Units) -> str | None:
    if name == "Delta":
        return base.of("length")
    info = symbol_info(name)
    return None if info is None else base.derivative(info[0], sum(info[1]))


def _json(model: ClosureModel) -> str:
    terms = []
    for t in model.active_terms:
        terms.append({"name": t.name, "coefficient": t.coefficient,
                      "coefficient_scaled": t.coefficient_scaled,
                      "delta_power": t.term.to_dict()["delta_power"],
                      "expression": {v: e for v, e in zip(model.components,
                                                          t.expression.values(),
                                                          strict=True)}})
    doc = {
        "format": "closure-model-coefficients",
        "schema_version": 1,
        "target": model.target,
        "components": model.components,
        "scheme": model.scheme,
        "delta": model.delta,
        "inputs": inputs(model),
        "units": units_of(model),
        "prediction": "component = sum over terms of coefficient_scaled * expression "
                      "(expressions include Delta**delta_power)",
        "terms": terms,
        "caution": model.caution,
    }
    return json.dumps(doc, indent=2, allow_nan=False) + "\n"


class _Code:
    """The model's prediction as sympy assignments, shared by the code printers."""

    def __init__(self, model: ClosureModel, name: str):
        self.model = model
        self.name = name
        self.outputs = list(model.components)
        self.inputs = inputs(model)
        active = [(t.term, t.coefficient_scaled) for t in model.active_terms]
        self.constants = [(f"coef_{t.name}", float(c)) for t, c in active]
        coef = {t.name: sympy.Symbol(f"coef_{t.name}", real=True) for t, _ in active}
        exprs = []
        for key in model.library.keys:
            e = sympy.Integer(0)
            for t, _ in active:
                e += coef[t.name] * t.components[key]
            exprs.append(_printable(e))
        names = [*self.inputs, *(n for n, _ in self.constants), *self.outputs]
        for n in names:
            if not _IDENT.match(n):
                raise UserError(f"{n!r} is not a valid identifier for C and Fortran: rename it")
        if name in names:
            raise UserError(f"the function name {name!r} is also a variable name: choose another "
                            "--name")
        self.names = names
        taken = {n.lower() for n in names}
        temps = (sympy.Symbol(f"tmp_{i}", real=True) for i in _count(taken))
        self.temporaries, self.results = sympy.cse(exprs, symbols=temps, order="none")

    def _check_case(self):
        seen = {}
        for n in [*self.names, self.name, f"{self.name}_mod"]:
            low = n.lower()
            if low in seen and seen[low] != n:
                raise UserError(f"{seen[low]!r} and {n!r} differ only in case, which Fortran "
                                "does not distinguish: rename one")
            seen[low] = n

    # -- header ----------------------------------------------------------------------------

    def header_lines(self) -> list[str]:
        m = self.model
        f = m.filter
        units = units_of(m)
        base = units["base"]

        def un(u):
            return f" [{NOT_RECORDED}]" if u is None else " [dimensionless]" if u == "1" \
                else f" [{u}]"

        lines = [
            f"Closure model for the subgrid {_target_words(m.target)} ({', '.join(self.outputs)})",
            f"generated by closure {m.provenance.get('closure_version', '')} from its sympy "
            "expressions.",
            "",
            f"Filter: {f.get('kind')}, width Delta = {m.delta!r}, coarsening ratio "
            f"{f.get('ratio')}.",
            f"Derivatives: {m.scheme} scheme on the coarse grid (compute the inputs with the "
            "same scheme, or the coefficients mean something else).",
            "Units: those of the training data (coordinates: "
            f"{base['length'] or NOT_RECORDED}; velocity: {base['velocity'] or NOT_RECORDED}; "
            f"time: {base['time'] or NOT_RECORDED}" + "".join(
                f"; {c}: {u}" for c, u in base["scalars"].items()) + "); Delta in coordinate "
            "units.",
            "Inputs (pointwise values of the filtered fields' derivatives) [units]:",
        ]
        for n in self.inputs:
            lines.append(f"  {n}: {_input_words(n)}{un(units['inputs'].get(n))}")
        lines.append("Outputs (modelled subgrid terms; the filtered equations subtract them, "
                     "see the closure conventions) [units]:")
        for o in self.outputs:
            lines.append(f"  {o}{un(units['outputs'].get(o))}")
        lines.append("Terms (Delta-scaled coefficient) [units]:")
        for n, c in self.constants:
            lines.append(f"  {n[5:]}: {c!r}{un(units['coefficient_scaled'].get(n[5:]))}")
        if not self.constants:
            lines.append("  none: the model predicts zero")
        lines.append("")
        lines.append("CAUTION: " + m.caution)
        out = []
        for ln in lines:
            indent = " " * (len(ln) - len(ln.lstrip()))
            out += textwrap.wrap(ln, 88, subsequent_indent=indent + "  ") or [""]
        return out

    # -- Python ----------------------------------------------------------------------------

    def python(self) -> str:
        from sympy.printing.numpy import NumPyPrinter

        pr = NumPyPrinter({"fully_qualified_modules": True, "allow_unknown_functions": False})
        head = "\n".join(("# " + ln).rstrip() for ln in self.header_lines())
        args = ", ".join(a for a in self.inputs if a != "Delta")
        sig = f"{args}, Delta=DELTA" if args else "Delta=DELTA"
        body = []
        for s, e in self.temporaries:
            body.append(f"        {s} = {pr.doprint(e)}")
        for out, e in zip(self.outputs, self.results, strict=True):
            body.append(f"        {out} = {pr.doprint(e)}")
        shape_args = ", ".join(f"numpy.shape({a})" for a in self.inputs if a != "Delta")
        ret = ", ".join(f'"{o}": numpy.broadcast_to(numpy.asarray({o}, dtype=float), _shape)'
                        f".copy()" for o in self.outputs)
        consts = "\n".join(f"{n} = {c!r}" for n, c in self.constants)
        return "\n".join([
            head,
            '"""Modelled subgrid terms as a numpy function (see the comment above)."""',
            "",
            "import numpy",
            "",
            f"DELTA = {self.model.delta!r}",
            f"INPUTS = {tuple(self.inputs)!r}",
            f"OUTPUTS = {tuple(self.outputs)!r}",
            consts,
            "",
            "",
            f"def {self.name}({sig}):",
            f'    """Return {{{", ".join(self.outputs)}}} as float arrays of the inputs\' '
            'broadcast shape."""',
            f"    _shape = numpy.broadcast_shapes({shape_args})" if shape_args else
            "    _shape = ()",
            '    with numpy.errstate(divide="ignore", invalid="ignore"):',
            *body,
            f"    return {{{ret}}}",
            "",
        ])

    # -- C ---------------------------------------------------------------------------------

    def c(self) -> str:
        head = "\n".join([" * " + ln if ln else " *" for ln in self.header_lines()])
        params = [f"double {a}" for a in self.inputs] + [f"double *{o}" for o in self.outputs]
        sig = f"void {self.name}(" + ",\n    ".join(params) + ")"
        body = [f"    const double {n} = {_c_double(c)};" for n, c in self.constants]
        for s, e in self.temporaries:
            kind = "int" if isinstance(e, sympy.logic.boolalg.Boolean) else "double"
            body.append(f"    const {kind} {s} = {_c(e)};")
        for out, e in zip(self.outputs, self.results, strict=True):
            body.append(f"    *{out} = {_c(e)};")
        # mark unused inputs so strict compilers stay quiet
        body += [f"    (void){a};" for a in self.inputs if not self._used(a)]
        return "\n".join(["/*", head, " */", "", "#include <math.h>", "", sig, "{",
                          *body, "}", ""])

    # -- Fortran ---------------------------------------------------------------------------

    def fortran(self) -> str:
        self._check_case()
        head = "\n".join(("! " + ln).rstrip() for ln in self.header_lines())
        mod = f"{self.name}_mod"
        args = [*self.inputs, *self.outputs]
        lines = [head, f"module {mod}", "  implicit none", "  private",
                 f"  public :: {self.name}", "contains", ""]
        lines.append(f"  subroutine {self.name}( &")
        for i, a in enumerate(args):
            lines.append(f"      {a}{', &' if i < len(args) - 1 else ')'}")
        for a in self.inputs:
            lines.append(f"    double precision, intent(in) :: {a}")
        for o in self.outputs:
            lines.append(f"    double precision, intent(out) :: {o}")
        for n, c in self.constants:
            lines.append(f"    double precision, parameter :: {n} = {_f_double(c)}")
        for s, e in self.temporaries:
            kind = "logical" if isinstance(e, sympy.logic.boolalg.Boolean) else \
                "double precision"
            lines.append(f"    {kind} :: {s}")
        for s, e in self.temporaries:
            lines.append(_fortran_assign(e, str(s)))
        for out, e in zip(self.outputs, self.results, strict=True):
            lines.append(_fortran_assign(e, out))
        lines += [f"  end subroutine {self.name}", "", f"end module {mod}", ""]
        return "\n".join(lines)

    def _used(self, name: str) -> bool:
        exprs = [e for _, e in self.temporaries] + list(self.results)
        return any(name in {s.name for s in e.free_symbols} for e in exprs)


def _count(taken):
    i = 0
    while True:
        if f"tmp_{i}" not in taken:
            yield i
        i += 1


def _printable(e: sympy.Expr) -> sympy.Expr:
    """Rewrite sign() as Piecewise and make Piecewise branches floating point, so every
    printer gives real double-precision code (Fortran's merge needs matching types)."""
    e = e.replace(sympy.sign, lambda a: sympy.Piecewise((1, a > 0), (-1, a < 0), (0, True)))

    def floats(*args):
        return sympy.Piecewise(*[(sympy.Float(v) if v.is_Number else v, c) for v, c in args])

    return e.replace(sympy.Piecewise, floats)


def _c(e) -> str:
    return sympy.ccode(e, standard="c99", math_macros={})


def _c_double(x: float) -> str:
    return repr(float(x))


def _f_double(x: float) -> str:
    m, _, ex = f"{float(x):.17e}".partition("e")
    return f"{m}d{int(ex)}"


def _fortran_assign(e, name: str) -> str:
    text = sympy.fcode(e, assign_to=name, source_format="free", standard=2003)
    return textwrap.indent(text, "    ")


def _target_words(target: str) -> str:
    if target == "stress":
        return "stress tau_ij"
    if target == "force":
        return "force d_j tau_ij"
    if target == "vorticity":
        return "vorticity forcing"
    if target in ("heat_flux", "pressure_dilatation"):
        return {"heat_flux": "Favre heat flux q_j",
                "pressure_dilatation": "pressure-dilatation"}[target]
    return f"flux of {target.split(':', 1)[1]}"


def _input_words(name: str) -> str:
    if name == "Delta":
        return "filter width (coordinate units)"
    info = symbol_info(name)
    if info is None:
        return ""
    f, counts = info
    order = sum(counts)
    if order == 0:
        return f"the filtered {f}"
    parts = " ".join(f"d{d}" + (f"^{n}" if n > 1 else "") for d, n in zip("xyz", counts,
                                                                           strict=True) if n)
    return f"d^{order} {f} / {parts}" if order > 1 else f"d{f}/{parts}"


__all__ = ["LANGUAGES", "export_model", "inputs", "units_of", "DELTA"]
