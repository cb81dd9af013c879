"""Candidate terms for subgrid closures: sympy expressions, presets, user-defined terms.

Every term is a sympy expression first; its numerical evaluation (``sympy.lambdify`` with
numpy), its LaTeX and its C / Fortran / Python code (closure.export) all derive from it.

Symbols
-------
A term is a pointwise function of derivatives of the filtered fields on the coarse grid and of
the filter width. The symbols are valid C and Fortran identifiers:

    du_dx, dv_dy, dc_dz       first derivatives of the filtered velocity u, v, w or a scalar c
    d2u_dxx, d2u_dxy          second derivatives (directions in x, y, z order)
    d3u_dxxy, d4v_dxxyy, ...  higher derivatives: d<order><field>_d<directions>
    c                         the filtered scalar itself (user terms only)
    Delta                     the filter width (coordinate units)

A derivative is computed once per snapshot with closure.derivatives.derivative and the user's
scheme (spectral, fd2 or fd4, the coarse solver's own): ``d3u_dxxy`` is the second x derivative
(the scheme's own second-derivative stencil) followed by the first y derivative.

Terms
-----
``A_ij = d_j u_i`` (``A_xy = du_dy``), ``S = (A + A^T)/2``, ``R = (A - A^T)/2``,
``|S| = sqrt(2 S_ij S_ij)``. Stress targets are fitted as one symmetric tensor with one
coefficient per term shared by its components; force, scalar-flux and vorticity-forcing targets
as one vector (or scalar). Terms that are divergences or curls of tensor terms are expanded with
the chain rule into pointwise expressions of the resolved derivatives (``div_smagorinsky`` is
``d_j (Delta^2 |S| S_ij)`` written out), so the coarse solver needs only the derivative fields.
No built-in term contains a bare velocity, so the library is Galilean invariant.

Each term carries a power ``p`` of Delta: its components include ``Delta**p``, so the fitted
multiplier of a ``design`` column is the Delta-scaled coefficient ``coefficient_scaled``; the
dimensional coefficient of the Delta-free expression is ``coefficient_scaled * Delta**p``. Where
the term times Delta^p has the target's units, ``coefficient_scaled`` is dimensionless
(``Term.dimensionless``); otherwise ``Term.scaled_units`` gives its units (e.g. an eddy viscosity
``{"length": 2, "time": -1}`` for the ``strain`` term).

Divergences of ``|S|`` terms divide by ``|S|``; such components are written
``Piecewise((expr, |S|^2 > 0), (0, True))``: their limit where the strain vanishes is 0, and a
coarse run that starts from rest must not see 0/0.

Presets (``make_library(name, target, dims)``)
----------------------------------------------
``default``  every built-in term for the target; ``classic``  the Smagorinsky form and the
gradient model; ``minimal``  the Smagorinsky form alone (eddy viscosity / diffusivity).

Exact dependencies. A term that is an exact linear combination of earlier terms of its library
(or vanishes) cannot be fitted apart from them, so presets leave it out and list it in
``Library.dropped`` with the combination, e.g. ``"rotation_squared: a linear combination of
earlier terms on any field (rotation_squared = strain_squared - 12 gradient_model -
strain_rotation)"`` (from ``A A^T = S S - (S R - R S) - R R``), and in 2-D ``strain_squared =
1/4 isotropic`` (``S S = |S|^2/4 I`` when ``tr S = 0``). The test is symbolic and exact (see
:func:`find_dependencies`); the preset order puts the preferred terms first (Smagorinsky,
gradient model, strain, isotropic part, then the products), so those survive. Force, flux and
vorticity terms are checked on their own expressions, so a dependency among the stress terms
carries over to their divergences and curls, and new ones (a curl of a gradient) are found
too. ``make_library(..., prune=False)`` keeps every built-in term.

On 2-D and 3-D grids the libraries assume an incompressible filtered velocity: the check uses
``dv_dy = -du_dx`` (2-D) or ``dw_dz = -du_dx - dv_dy`` (3-D) and their derivatives. This holds
for filtered incompressible data on periodic grids (the filters commute with derivatives).
For compressible data, or a 2-D slice of a 3-D flow, list the terms wanted in a terms file
(user terms are never dropped) or build the library with ``prune=False``. In 1-D nothing is
assumed.

Terms files (user-defined terms)
--------------------------------
A YAML or JSON file::

    target: stress              # optional; must match the job's target
    include: classic            # optional; start from a preset
    allow_bare_velocity: false  # optional; bare u, v, w break Galilean invariance
    terms:
      - name: smagorinsky_cubed          # letters, digits, _ ; unique
        delta_power: 2
        description: my eddy viscosity   # optional
        expression: "Delta**2 * S_mag * S_{i}{j}"   # {i}, {j}: the component's directions
      - name: my_tensor
        delta_power: 2
        components:                      # or every component written out
          xx: "Delta**2 * du_dx**2"
          xy: "Delta**2 * du_dx*dv_dx"
          yy: "Delta**2 * dv_dx**2"

Component keys: ``xx, xy, yy, xz, yz, zz`` (stress), ``x, y, z`` (force, flux), and a single
``expression`` for the scalar vorticity forcing. Names usable in expressions: the derivative
symbols above, ``Delta``, ``A_xy`` (= du_dy), ``S_xy``, ``R_xy``, ``kronecker_xy``, ``S_mag``
(|S|), ``omega`` (2-D: dv_dx - du_dy), the scalar names, numbers, ``+ - * / **`` and the
functions ``sqrt, abs, exp, log, tanh`` and ``dx, dy, dz`` (chain-rule derivative of an
expression) and ``lap`` (its Laplacian). Duplicated names are not allowed. A user term that is
an exact linear combination of earlier terms (a duplicated expression, or one equal to a preset
term on incompressible fields) is kept, because the file asked for it, and named with the
combination in ``Library.warnings``, which the model file and its summary carry; the fit's
numerical collinearity check reports it as well.

Layout
------
One module per job; this package re-exports their public names (and the private ones other
modules and the tests use)::

    kinematics.py   targets, component keys, derivative symbols, Kinematics (symbolic)
    terms.py        Term and Library, LaTeX
    dimensions.py   dimensional analysis of expressions (units of coefficients)
    build.py        a Term from sympy components (canonical form, printable check, units)
    pruning.py      exact linear dependencies between terms (find_dependencies)
    presets.py      the built-in presets, cached in process and on disk
    expressions.py  the restricted expression parser (Namespace, parse_expression)
    termsfile.py    terms files, inline terms, model-file term records
    make.py         make_library: preset, compressible preset or terms file
    evaluation.py   derivative fields, design matrices, predictions
"""

from __future__ import annotations

from closure.grid import VELOCITY_OF  # the tests reach it here, as before the split
from closure.library.build import _make_term, _probe, _probe_values, _scaled_units
from closure.library.evaluation import (
    _check_library_grid,
    derivative_fields,
    design,
    evaluate_terms,
    predict,
)
from closure.library.expressions import Namespace, parse_expression
from closure.library.kinematics import (
    _INFO,
    _SYMBOLS,
    AXES,
    DELTA,
    Kinematics,
    check_scalar_names,
    component_keys,
    component_weights,
    directions,
    field_symbol,
    parse_target,
    symbol_info,
    symbol_name,
    target_components,
    target_rank,
)
from closure.library.make import make_library
from closure.library.presets import (
    _CLASSIC,
    _MINIMAL,
    PRESETS,
    _builtin_terms,
    _cache_folder,
    _default_terms,
    _disk_cache,
    _matrix_components,
    _preset,
    _preset_terms,
)
from closure.library.pruning import (
    Dependency,
    _DependencyCheck,
    _monomial_bound,
    _prune,
    find_dependencies,
)
from closure.library.terms import (
    Library,
    Term,
    _guard,
    latex_symbol_names,
    to_latex,
)
from closure.library.termsfile import (
    load_terms_file,
    terms_from_data,
    terms_from_dicts,
    terms_from_inline,
)

__all__ = [  # the public names, and the private ones other modules and the tests use
    "VELOCITY_OF",
    "AXES",
    "check_scalar_names",
    "component_keys",
    "component_weights",
    "DELTA",
    "Dependency",
    "derivative_fields",
    "design",
    "directions",
    "evaluate_terms",
    "field_symbol",
    "find_dependencies",
    "Kinematics",
    "latex_symbol_names",
    "Library",
    "load_terms_file",
    "make_library",
    "Namespace",
    "parse_expression",
    "parse_target",
    "predict",
    "PRESETS",
    "symbol_info",
    "symbol_name",
    "target_components",
    "target_rank",
    "Term",
    "terms_from_data",
    "terms_from_dicts",
    "terms_from_inline",
    "to_latex",
    "_builtin_terms",
    "_cache_folder",
    "_check_library_grid",
    "_CLASSIC",
    "_default_terms",
    "_DependencyCheck",
    "_disk_cache",
    "_guard",
    "_INFO",
    "_make_term",
    "_matrix_components",
    "_MINIMAL",
    "_monomial_bound",
    "_preset",
    "_preset_terms",
    "_private",
    "_probe",
    "_probe_values",
    "_prune",
    "_scaled_units",
    "_SYMBOLS",
]
