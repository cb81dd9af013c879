"""What a model says about its input (path, checksum, variables, held-out snapshots): shared by
the report's data gathering (gather.py) and its page (page.py), below both."""

from __future__ import annotations

from collections.abc import Mapping


def provenance_input(model) -> dict:
    """What the model says about its input: ``path``, ``sha256``, ``variables``, ``scalars``,
    ``periodic``, ``test`` (held-out snapshot indices); None where not recorded."""
    prov = dict(getattr(model, "provenance", None) or {})
    spec = prov.get("spec") if isinstance(prov.get("spec"), Mapping) else {}
    spec_in = spec.get("input") if isinstance(spec.get("input"), Mapping) else {}
    inp = prov.get("input")
    inp = dict(inp) if isinstance(inp, Mapping) else {"path": inp}
    snaps = prov.get("snapshots") if isinstance(prov.get("snapshots"), Mapping) else {}
    test = snaps.get("test", inp.get("test"))
    scalars = list(getattr(model, "scalars", ()) or spec_in.get("scalars") or [])
    target = getattr(model, "target", "")
    if target.startswith("flux:") and target[5:] not in scalars:
        scalars.append(target[5:])
    path = inp.get("path") or spec_in.get("path")
    paths = prov.get("inputs") if isinstance(prov.get("inputs"), list) else None
    if not paths or (isinstance(path, str) and paths[0] != path):  # "input" edited by hand
        paths = [path] if isinstance(path, str) else path
    options = prov.get("input_options") if isinstance(prov.get("input_options"), Mapping) \
        else {k: spec_in.get(k) for k in ("group", "mask", "levels", "spacing")}
    return {
        "path": paths[0] if paths else None,
        "paths": list(paths or []),
        "options": {k: options.get(k) for k in ("group", "mask", "levels", "spacing")},
        "sha256": inp.get("sha256") or prov.get("sha256") or spec_in.get("sha256"),
        "variables": dict(prov.get("variables") or spec_in.get("variables") or {}),
        "scalars": scalars,
        "periodic": spec_in.get("periodic", model.grid.periodic if hasattr(model, "grid")
                                else True),
        "test": None if test is None else [int(i) for i in test],
    }
