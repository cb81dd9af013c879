""":func:`make_library`: a preset, a compressible preset (closure.library_compressible) or a
terms file, by name.
"""


from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path

from closure.errors import UserError
from closure.library.kinematics import check_scalar_names, component_keys, directions, parse_target
from closure.library.presets import PRESETS, _preset
from closure.library.terms import Library
from closure.library.termsfile import load_terms_file


def make_library(name_or_path: str, target: str, dims: Iterable[str],
                 scalars: Iterable[str] = (), *, prune: bool = True) -> Library:
    """A preset (``default``, ``classic``, ``minimal``; for Favre-filtered compressible data
    ``compressible``, ``compressible_classic``, ``compressible_minimal`` from
    closure.library_compressible) or a terms file, for ``target`` on a grid with ``dims``.
    ``scalars`` are the scalar fields available (the target's own scalar is added). Preset
    terms that depend exactly on earlier ones (on incompressible fields in 2-D and 3-D; on any
    field for the compressible presets) are left out and listed in ``Library.dropped``, unless
    ``prune`` is False; user terms are kept and their dependencies reported in
    ``Library.warnings``. Presets are cached per (preset, target, dims, scalars). Raises
    UserError naming the problem."""
    kind, scalar = parse_target(target)
    dims = tuple(dims)
    component_keys(target, dims)  # checks vorticity needs (y, x)
    scalars = tuple(scalars) if not isinstance(scalars, str) else (scalars,)
    if scalar is not None and scalar not in scalars:
        scalars = (*scalars, scalar)
    scalars = check_scalar_names(scalars)
    from closure import library_compressible as compressible

    if name_or_path in compressible.PRESETS:
        return compressible.compressible_library(str(name_or_path), target, dims, bool(prune))
    if kind in compressible.TARGETS and kind != "stress":
        raise UserError(f"the target {target} needs a compressible library: choose "
                        f"{', '.join(compressible.PRESETS)}")
    if name_or_path in PRESETS:
        return _preset(str(name_or_path), target, directions(dims), scalars, dims, bool(prune))
    path = Path(str(name_or_path))
    if not path.suffix and not path.exists():
        raise UserError(f"unknown library {name_or_path!r}: choose {', '.join(PRESETS)} or give "
                        "the path of a terms file (.yaml, .yml or .json)")
    return load_terms_file(path, target, dims, scalars, prune=prune)
