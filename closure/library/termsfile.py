"""Terms files (user-defined terms, YAML or JSON; the syntax is in the closure.library
docstring), inline definitions, and the term records of model files.
"""


from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path

from closure.errors import UserError
from closure.library.build import _make_term
from closure.library.expressions import Namespace, parse_expression
from closure.library.kinematics import _NAME, Kinematics, component_keys, target_rank
from closure.library.presets import PRESETS, _preset_terms
from closure.library.pruning import Dependency, find_dependencies
from closure.library.terms import Library, Term

# ---------------------------------------------------------------------------------------------
# terms files

_FILE_KEYS = {"format", "target", "include", "allow_bare_velocity", "terms", "description"}
_TERM_KEYS = {"name", "delta_power", "description", "expression", "components"}


def load_terms_file(path: str | Path, target: str, dims: Iterable[str],
                    scalars: Iterable[str] = (), *, prune: bool = True) -> Library:
    """Read user-defined terms (format in the module docstring) for ``target``."""
    path = Path(path)
    if not path.is_file():
        raise UserError(f"no terms file {path}: give a preset ({', '.join(PRESETS)}) or the path "
                        "of a .yaml/.json terms file")
    text = path.read_text(encoding="utf-8", errors="replace")
    try:
        if path.suffix.lower() == ".json":
            data = json.loads(text)
        else:
            import yaml

            data = yaml.safe_load(text)
    except Exception as exc:
        kind = "JSON" if path.suffix.lower() == ".json" else "YAML"
        raise UserError(f"terms file {path} is not valid {kind}: {exc}") from None
    return terms_from_data(data, target, dims, scalars, name=str(path), prune=prune)


def terms_from_inline(definitions, target: str, dims: Iterable[str],
                      scalars: Iterable[str] = (), *, prune: bool = True) -> Library:
    """A Library from term definitions given inline (a job spec's ``library``): a terms
    file's content as parsed JSON, either its whole mapping or just its list of terms."""
    data = {"terms": definitions} if isinstance(definitions, list) else definitions
    return terms_from_data(data, target, dims, scalars, name="(inline)", prune=prune)


def terms_from_data(data, target: str, dims: Iterable[str], scalars: Iterable[str] = (),
                    name: str = "terms", *, prune: bool = True) -> Library:
    """Build a Library from the parsed contents of a terms file. An included preset is
    pruned as by :func:`make_library`; a user term that depends exactly on earlier terms is
    kept (the file asked for it) and named with the relation in ``Library.warnings``."""
    where = f"terms file {name}"
    if not isinstance(data, dict):
        raise UserError(f"{where}: expected a mapping with a 'terms' list at the top")
    unknown = set(data) - _FILE_KEYS
    if unknown:
        raise UserError(f"{where}: unknown key(s) {', '.join(sorted(map(str, unknown)))}; allowed "
                        f"are {', '.join(sorted(_FILE_KEYS))}")
    if data.get("format", 1) != 1:
        raise UserError(f"{where}: format {data['format']!r} is not supported (use format: 1)")
    if "target" in data and data["target"] != target:
        raise UserError(f"{where} is written for target {data['target']!r}, not {target!r}: "
                        "use a terms file for this target or change the target")
    allow = data.get("allow_bare_velocity", False)
    if not isinstance(allow, bool):
        raise UserError(f"{where}: allow_bare_velocity must be true or false")
    dims = tuple(dims)
    k = Kinematics(dims, scalars)
    ns = Namespace(k, allow_bare_velocity=allow)
    terms: list[Term] = []
    dropped: tuple[Dependency, ...] = ()
    if "include" in data:
        inc = data["include"]
        if inc not in PRESETS:
            raise UserError(f"{where}: include must be one of {', '.join(PRESETS)}, got {inc!r}")
        base, dropped = _preset_terms(inc, target, k.dirs, k.scalars, prune)
        terms.extend(base)
    n_base = len(terms)
    items = data.get("terms", [])
    if not isinstance(items, list) or (not items and not terms):
        raise UserError(f"{where}: 'terms' must be a non-empty list of terms")
    keys = component_keys(target, dims)
    for n, item in enumerate(items):
        terms.append(_user_term(item, n, target, keys, k, ns, where))
    seen = set()
    for t in terms:
        if t.name in seen:
            raise UserError(f"{where}: the term name {t.name!r} is used twice; names must be "
                            "unique")
        seen.add(t.name)
    found = find_dependencies(terms, k.dirs, independent=n_base) if prune else []
    user_deps = [d for d in found if d is not None]
    warnings = tuple(_user_dependency_warning(where, d) for d in user_deps)
    return Library(name, target, dims, k.scalars, tuple(terms),
                   tuple(d.describe() for d in dropped), warnings, (*dropped, *user_deps))


def _user_dependency_warning(where: str, dep: Dependency) -> str:
    if not dep.combination:
        return (f"{where}: term {dep.term} vanishes identically {dep.where}; it is kept as "
                "listed, but it cannot be fitted: remove it")
    others = [n for n, _, _ in dep.combination]
    return (f"{where}: term {dep.term} is an exact linear combination of {', '.join(others)} "
            f"{dep.where} ({dep.equation}); it is kept as listed, but the fit cannot separate "
            f"its coefficient from theirs: remove {dep.term} or the terms it repeats")


def _user_term(item, n, target, keys, k, ns, where) -> Term:
    here = f"{where}, term {n + 1}"
    if not isinstance(item, dict):
        raise UserError(f"{here}: each term must be a mapping with name, delta_power and "
                        "expression or components")
    unknown = set(item) - _TERM_KEYS
    if unknown:
        raise UserError(f"{here}: unknown key(s) {', '.join(sorted(map(str, unknown)))}; allowed "
                        f"are {', '.join(sorted(_TERM_KEYS))}")
    name = item.get("name")
    if not isinstance(name, str) or not _NAME.match(name):
        raise UserError(f"{here}: name {name!r} must start with a letter and contain only "
                        "letters, digits and _ (at most 40 characters)")
    here = f"{where}, term {name!r}"
    p = item.get("delta_power")
    if isinstance(p, bool) or not isinstance(p, int | float) or not math.isfinite(p):
        raise UserError(f"{here}: delta_power must be a number (the power of Delta the "
                        "expression carries), got {p!r}")
    desc = item.get("description", "")
    if not isinstance(desc, str):
        raise UserError(f"{here}: description must be text")
    has_e, has_c = "expression" in item, "components" in item
    if has_e == has_c:
        raise UserError(f"{here}: give exactly one of 'expression' (with {{i}}, {{j}} for the "
                        "component directions) or 'components'")
    comps = {}
    if has_c:
        given = item["components"]
        if not isinstance(given, dict):
            raise UserError(f"{here}: components must map component keys to expressions")
        given = {str(a): b for a, b in given.items()}
        extra = set(given) - set(keys)
        missing = [c for c in keys if c not in given]
        if keys == [""]:
            raise UserError(f"{here}: the vorticity forcing is a scalar: use 'expression'")
        if extra or missing:
            raise UserError(f"{here}: components must be exactly {', '.join(keys)} for target "
                            f"{target} (missing: {', '.join(missing) or 'none'}; unexpected: "
                            f"{', '.join(sorted(extra)) or 'none'})")
        for key in keys:
            comps[key] = parse_expression(given[key], ns, f"{here} component {key}")
    else:
        tmpl = item["expression"]
        if not isinstance(tmpl, str):
            raise UserError(f"{here}: expression must be a string")
        rank = target_rank(target)
        uses = [m for m in ("{i}", "{j}") if m in tmpl]
        if rank == 2 and "{i}" not in tmpl and "{j}" not in tmpl:
            raise UserError(f"{here}: a stress expression must use {{i}} and {{j}} for the "
                            "component directions, e.g. Delta**2 * S_mag * S_{i}{j}")
        if rank == 1 and ("{i}" not in tmpl or "{j}" in tmpl):
            raise UserError(f"{here}: a vector expression uses {{i}} for the component "
                            "direction (and no {j}), e.g. Delta**2 * S_mag * dc_d{i}")
        if rank == 0 and uses:
            raise UserError(f"{here}: the vorticity forcing is a scalar: no {{i}}/{{j}}")
        for key in keys:
            text = tmpl
            if rank >= 1:
                text = text.replace("{i}", key[0])
            if rank == 2:
                text = text.replace("{j}", key[1])
            comps[key] = parse_expression(text, ns, f"{here} component {key or 'value'}")
    return _make_term(name, target, k, comps, p, desc, "user")


def terms_from_dicts(items: Sequence[Mapping], target: str, dims: Iterable[str],
                     scalars: Iterable[str] = (), name: str = "model") -> Library:
    """Rebuild terms from ``Term.to_dict()`` records (model files): expressions are parsed
    with the restricted parser, bare velocities allowed (a user term may have had them)."""
    k = Kinematics(dims, scalars)
    ns = Namespace(k, allow_bare_velocity=True)
    keys = component_keys(target, dims)
    terms = []
    for n, item in enumerate(items):
        tname = item.get("name")
        where = f"{name}: term {n + 1} ({tname!r})"
        if not isinstance(tname, str) or not _NAME.match(tname):
            raise UserError(f"{where}: invalid term name")
        exprs = item.get("expression")
        if not isinstance(exprs, dict) or sorted(exprs) != sorted(keys):
            raise UserError(f"{where}: expression must have components {', '.join(keys)}")
        comps = {key: parse_expression(exprs[key], ns, f"{where} component {key or 'value'}")
                 for key in keys}
        terms.append(_make_term(tname, target, k, comps, item.get("delta_power", 0),
                                str(item.get("description", "")),
                                str(item.get("source", "preset"))))
    if len({t.name for t in terms}) != len(terms):
        raise UserError(f"{name}: term names must be unique")
    return Library(name, target, tuple(dims), k.scalars, tuple(terms))
