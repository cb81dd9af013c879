"""The speed-ups keep the results: against direct FFT references and the previous code paths."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from closure import library as lib
from closure.derivatives import derivative, derivatives
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.library import design, make_library


def test_derivatives_of_several_orders_equal_one_order_at_a_time():
    g = Grid.regular((12, 16), 2 * np.pi)
    f = np.random.default_rng(0).standard_normal((3, 12, 16))
    for dim in ("x", "y"):
        many = derivatives(f, g, dim, [1, 2, 3, 4])
        for n, a in zip([1, 2, 3, 4], many, strict=True):
            assert np.array_equal(a, derivative(f, g, dim, n))  # the same bits
    # closed form: d^n/dx^n sin(3x) (exact for a resolved Fourier mode; common practice)
    y, x = g.mesh()
    d1, d2, d3 = derivatives(np.sin(3 * x), g, "x", [1, 2, 3])
    assert np.abs(d1 - 3 * np.cos(3 * x)).max() < 1e-12
    assert np.abs(d2 + 9 * np.sin(3 * x)).max() < 1e-12
    assert np.abs(d3 + 27 * np.cos(3 * x)).max() < 1e-11
    assert [a.shape for a in derivatives(f, g, "x", [2], "fd4")] == [f.shape]


@pytest.mark.parametrize(("n", "r"), [(32, 4), (30, 3), (16, 2)])
def test_fold_with_a_multiplier_is_the_sampled_filtered_field(n, r):
    # the coarse samples of the Gaussian-filtered field, G(k) = exp(-k^2 D^2 / 24) (Pope 2000,
    # Table 13.2), filtered with a plain numpy.fft transform of the whole row
    from closure.backend import NumpyBackend

    rng = np.random.default_rng(n)
    f = rng.standard_normal((5, n))
    k = 2 * np.pi * np.fft.rfftfreq(n, 2 * np.pi / n)
    G = np.exp(-(k**2) * (2 * r * 2 * np.pi / n) ** 2 / 24)
    cg = make_coarse_graining("gaussian", Grid.regular((n,), 2 * np.pi, ("x",)), r)
    folded = cg._folded_rows(f, ["f"], NumpyBackend())["f"]
    got = np.fft.irfft(folded, n=n // r, axis=-1)
    expect = np.fft.irfft(np.fft.rfft(f, axis=-1) * G, n=n, axis=-1)[:, ::r]
    assert np.abs(got - expect).max() < 1e-13


def test_design_columns_match_a_direct_fft_reference():
    # strain S_xy = (du_dy + dv_dx) / 2 and the gradient model Delta^2/12 du_i/dx_k du_j/dx_k
    # (Clark et al. 1979; Pope 2000, eq. 13.277) from derivatives taken with numpy.fft
    n = 24
    g = Grid.regular((n, n), 2 * np.pi)
    y, x = g.mesh()
    u = np.sin(2 * x + y) + 0.3 * np.cos(3 * y)
    v = np.cos(x - 2 * y) - 0.2 * np.sin(4 * x)
    k = np.fft.fftfreq(n, 1.0 / n)
    ky, kx = np.meshgrid(k, k, indexing="ij")

    def d(f, kk):
        return np.fft.ifft2(1j * kk * np.fft.fft2(f)).real

    ux, uy, vx, vy = d(u, kx), d(u, ky), d(v, kx), d(v, ky)
    delta = 0.4
    L = make_library("default", "stress", g.dims)
    X = design(L, {"u": u, "v": v}, g, "spectral", delta)  # (components, points, terms)
    col = {name: X[:, :, k_] for k_, name in enumerate(L.names)}
    assert np.abs(col["strain"][1] - 0.5 * (uy + vx).ravel()).max() < 1e-12
    gm_xy = delta**2 / 12 * (ux * vx + uy * vy)
    assert np.abs(col["gradient_model"][1] - gm_xy.ravel()).max() < 1e-12


def _terms_dump(terms, dropped):
    return ([(t.name, t.rank, t.delta_power, t.description, t.scaled_units,
              t.expressions()) for t in terms], [d.to_dict() for d in dropped])


@pytest.mark.parametrize(("target", "dirs", "scalars"),
                         [("stress", ("x", "y"), ()), ("flux:c", ("x", "y", "z"), ("c",))])
def test_preset_terms_from_the_disk_cache_equal_a_fresh_build(tmp_path, monkeypatch, target,
                                                              dirs, scalars):
    monkeypatch.setenv("CLOSURE_CACHE", str(tmp_path))
    build = lib._default_terms.__wrapped__  # past the in-process cache
    fresh = build(target, dirs, scalars, True)
    assert len(list(tmp_path.iterdir())) == 1
    cached = build(target, dirs, scalars, True)
    assert cached[0] is not fresh[0] and cached[0][0] is not fresh[0][0]  # read from the file
    assert _terms_dump(*cached) == _terms_dump(*fresh)
    g = Grid.regular((8,) * len(dirs), 2 * np.pi)
    rng = np.random.default_rng(2)
    fields = {c: rng.standard_normal(g.shape) for c in ("u", "v", "w")[:len(dirs)] + scalars}
    out = []
    for terms, dropped in (fresh, cached):
        L = lib.Library("default", target, g.dims, scalars, terms, (), (), dropped)
        out.append(design(L, fields, g, "spectral", 0.3))
    assert np.array_equal(out[0], out[1])


def test_a_damaged_cache_entry_is_rebuilt_and_off_keeps_nothing(tmp_path, monkeypatch):
    monkeypatch.setenv("CLOSURE_CACHE", str(tmp_path))
    build = lib._default_terms.__wrapped__
    fresh = build("stress", ("x", "y"), (), True)
    (entry,) = tmp_path.iterdir()
    entry.write_bytes(b"not JSON")
    again = build("stress", ("x", "y"), (), True)
    assert _terms_dump(*again) == _terms_dump(*fresh)
    off = tmp_path / "off"
    monkeypatch.setenv("CLOSURE_CACHE", "off")
    monkeypatch.setenv("XDG_CACHE_HOME", str(off))
    build("stress", ("x", "y"), (), True)
    assert not off.exists()


def test_a_cache_entry_holds_nothing_but_terms(tmp_path, monkeypatch):
    # entries are JSON read with the restricted expression parser of model files: code put in
    # an entry is refused as an expression (the entry is rebuilt), never run
    import json

    monkeypatch.setenv("CLOSURE_CACHE", str(tmp_path))
    build = lib._default_terms.__wrapped__
    fresh = build("stress", ("x", "y"), (), True)
    (entry,) = tmp_path.iterdir()
    doc = json.loads(entry.read_text())
    assert {"terms", "dropped"} <= set(doc)
    marker = tmp_path / "ran"
    doc["terms"][0]["expression"] = {k: f"__import__('pathlib').Path('{marker}').touch()"
                                     for k in doc["terms"][0]["expression"]}
    entry.write_text(json.dumps(doc))
    assert lib._disk_cache("default_terms", ("stress", ("x", "y"), (), True)) is None
    again = build("stress", ("x", "y"), (), True)
    assert not marker.exists()
    assert _terms_dump(*again) == _terms_dump(*fresh)


def test_help_and_coarse_grain_import_no_plotting_web_or_fitting_library():
    code = ("import sys; from closure.cli import main; import closure.cli.coarse as c; "
            "rc = main(['--help']); "
            "print(sorted(m for m in ('matplotlib', 'fastapi', 'sklearn', 'httpx', 'uvicorn', "
            "'sympy') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert out.strip().splitlines()[-1] == "[]"


def test_coarse_grain_imports_no_plotting_web_fitting_or_symbolic_library(make_netcdf, tmp_path):
    rng = np.random.default_rng(0)
    path = make_netcdf({"u": rng.standard_normal((2, 16, 16)),
                        "v": rng.standard_normal((2, 16, 16))})
    code = ("import sys; from closure.cli import main; "
            f"rc = main(['coarse-grain', {str(path)!r}, '-o', {str(tmp_path / 'c.nc')!r}]); "
            "print(rc, sorted(m for m in ('matplotlib', 'fastapi', 'sklearn', 'httpx', "
            "'uvicorn', 'sympy') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert out.strip().splitlines()[-1] == "0 []"


def test_the_cache_key_covers_every_module_of_the_library_package(tmp_path, monkeypatch):
    # the terms depend on kinematics, build, pruning ... not only on presets.py: an edit of
    # any module of closure.library must miss the entries written before it
    import shutil

    import closure.library.presets as presets

    monkeypatch.setenv("CLOSURE_CACHE", str(tmp_path / "cache"))
    sources = presets._cache_sources()
    assert {p.name for p in sources} >= {"kinematics.py", "build.py", "pruning.py",
                                         "presets.py", "terms.py"}
    key = ("stress", ("x", "y"), (), True)
    lib._default_terms.__wrapped__(*key)
    assert lib._disk_cache("default_terms", key) is not None
    copy = tmp_path / "src"
    copy.mkdir()
    for p in sources:
        shutil.copy(p, copy / p.name)
    (copy / "pruning.py").write_text((copy / "pruning.py").read_text() + "\n# edited\n")
    monkeypatch.setattr(presets, "_cache_sources", lambda: sorted(copy.glob("*.py")))
    assert lib._disk_cache("default_terms", key) is None
