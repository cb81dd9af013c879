"""The 3-D coarse solver of ``closure.les``: incompressible LES in a periodic (z, y, x) box.

    d_t u_i = P[u x omega]_i - P[d_j tau_ij]_i + P[f]_i - nu (-lap)^p u_i - mu u_i
              - nu_h (-lap)^(-q) u_i

built on the demo generator's operators (:class:`closure.synth.turb3d.NavierStokes3D`:
rotational form, 2/3 rule, Leray projection ``P``, integrating-factor RK4). The subgrid stress
``tau_ij`` comes from a closure (a stored stress or force model, or a baseline of
``closure.les``); hyper- (``p > 1``) and hypoviscosity (``nu_h``, order ``q``, not applied to
the mean mode) and linear drag ``mu`` enter the integrating factor.

Forcing (mode numbers, so the same on any grid that resolves it):

- ``none``;
- ``steady:K:A[:SEED]``: a steady random solenoidal body force on the modes with shell index
  ``1 <= |m| <= K``, rms ``A`` (m s^-2), seeded;
- ``power:K:P``: ``f_hat = P / (2 E_K) u_hat`` on the modes with ``1 <= |m| <= K`` where
  ``E_K`` is their kinetic energy, which injects the power ``P`` (m^2 s^-3) exactly at every
  instant (constant-power forcing of the lowest shells; common practice, e.g. Lamorgese,
  Caughey & Pope 2005, Phys. Fluids 17, from memory).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from closure.errors import OptionError, UserError
from closure.grid import Grid
from closure.spectral import (
    DEALIAS_FRACTION,
    cfl_time_step,
    fourier,
    project_hat,
    random_field_hat,
    shell_spacing,
    substeps,
)
from closure.synth.turb3d import NavierStokes3D

DIMS = ("z", "y", "x")
#: velocity names in grid.dims order (z, y, x)
VELOCITY = ("w", "v", "u")
FORCING3D_KINDS = ("none", "steady", "power", "modes")


def check_grid(grid: Grid) -> None:
    if grid.dims != DIMS:
        raise UserError(f"the 3-D coarse solver needs a (z, y, x) grid, got {grid.dims}")
    if not grid.periodic:
        raise UserError("the 3-D coarse solver needs periodic data")


@dataclass(frozen=True)
class Forcing3D:
    """A 3-D body force: ``kind`` none, steady or power (see the module docstring);
    ``wavenumber`` is the top shell index K, ``amplitude`` the rms force (steady, m s^-2) or
    the injected power (power, m^2 s^-3)."""

    kind: str = "none"
    wavenumber: float = 2.0
    amplitude: float = 0.0
    seed: int = 0
    #: for kind "modes": rows (m_z, m_y, m_x, component 0/1/2 for x/y/z, a, b), each adding
    #: a cos(k.x) + b sin(k.x) to that force component (m s^-2); see read_forcing_modes
    modes: tuple = ()
    source: str = ""

    def __post_init__(self):
        if self.kind not in FORCING3D_KINDS:
            raise OptionError(f"unknown 3-D forcing {self.kind!r}: choose one of "
                              f"{', '.join(FORCING3D_KINDS)}")
        if not (math.isfinite(self.amplitude) and math.isfinite(self.wavenumber)):
            raise OptionError("the forcing amplitude and wavenumber must be finite numbers")
        if self.kind != "none" and self.wavenumber < 1:
            raise OptionError(f"the forcing shell index K must be >= 1, got {self.wavenumber}")
        if self.kind == "power" and self.amplitude < 0:
            raise OptionError("the injected power must be >= 0")

    @property
    def active(self) -> bool:
        if self.kind == "modes":
            return bool(self.modes)
        return self.kind != "none" and self.amplitude != 0.0

    def band(self, grid: Grid) -> np.ndarray:
        """Mask (rfftn layout) of the forced modes, 1 <= |m| <= K."""
        F = fourier(grid)
        shell = np.sqrt(F.k2) / shell_spacing(grid)
        top = min(n * DEALIAS_FRACTION / 2 for n in grid.shape)
        if self.wavenumber >= top:
            raise UserError(f"the forcing shell K = {self.wavenumber:g} reaches beyond what a "
                            f"{'x'.join(map(str, grid.shape))} grid keeps after dealiasing: "
                            "use a smaller K or a finer grid")
        return ((shell > 0.5) & (shell <= self.wavenumber + 1e-9)).astype(float)

    def steady_hat(self, grid: Grid) -> np.ndarray:
        """The steady force (3, spectral) in grid.dims order: rms ``amplitude`` (steady), or
        the listed modes' solenoidal part (modes)."""
        if self.kind == "modes":
            return project_hat(fourier(grid).forward(modes_field(self.modes, grid, 3)), grid)
        band = self.band(grid)
        dk = shell_spacing(grid)
        fh = random_field_hat(grid, lambda k: np.where((k > 0.5 * dk)
                                                        & (k <= (self.wavenumber + 1e-9) * dk),
                                                        1.0, 0.0),
                              np.random.default_rng(self.seed), components=3, solenoidal=True)
        fh = fh * band
        F = fourier(grid)
        rms = math.sqrt(float(np.sum(F.half_weights * np.abs(fh) ** 2)) / F.size**2)
        return fh * (self.amplitude / rms) if rms > 0 else fh

    def to_attrs(self) -> dict:
        if self.kind == "modes":
            return {"forcing": "modes", "forcing_file": self.source,
                    "forcing_modes": len(self.modes)}
        return {"forcing": self.kind, "forcing_wavenumber": float(self.wavenumber),
                "forcing_amplitude": float(self.amplitude), "forcing_seed": int(self.seed)}


def parse_forcing3d(text: str | None, attrs: Mapping) -> Forcing3D:
    """``file`` (the file's forcing attributes when it names a 3-D kind, else none), ``none``,
    ``steady:K:A[:SEED]`` or ``power:K:P``."""
    text = (text or "file").strip()
    if text == "file":
        kind = str(attrs.get("forcing", "none"))
        if kind in ("steady", "power"):
            return Forcing3D(kind, float(attrs.get("forcing_wavenumber", 2.0)),
                             float(attrs.get("forcing_amplitude", 0.0)),
                             int(attrs.get("forcing_seed", 0)))
        return Forcing3D()
    if text == "none":
        return Forcing3D()
    parts = text.split(":")
    try:
        if parts[0] == "steady" and len(parts) in (3, 4):
            seed = int(parts[3]) if len(parts) == 4 else 0
            return Forcing3D("steady", float(parts[1]), float(parts[2]), seed)
        if parts[0] == "power" and len(parts) == 3:
            return Forcing3D("power", float(parts[1]), float(parts[2]))
    except ValueError:
        pass
    if text.startswith("modes:"):
        path = text[len("modes:"):]
        return Forcing3D("modes", modes=read_forcing_modes(path, 3), source=path)
    raise OptionError(f"--forcing {text!r} on a 3-D grid: use file, none, steady:K:A[:SEED], "
                      "power:K:P or modes:FILE")


class LESEquation3D(NavierStokes3D):
    """The 3-D LES right-hand side (module docstring). The state is the spectral velocity,
    shape ``(3,) + spectral_shape``, components in grid.dims order (w, v, u).

    ``subgrid`` is a callable of the real fields ``{"u", "v", "w"}`` returning the spectral
    momentum tendency (3, spectral), e.g. from :func:`closure.les.subgrid_term`.
    """

    def __init__(self, grid: Grid, viscosity: float = 0.0, drag: float = 0.0,
                 hyperviscosity_order: int = 1, hypoviscosity: float = 0.0,
                 hypoviscosity_order: int = 1, forcing: Forcing3D | None = None,
                 dealias: bool = True,
                 subgrid: Callable[[dict[str, np.ndarray]], np.ndarray] | None = None):
        check_grid(grid)
        if viscosity < 0 or drag < 0 or hypoviscosity < 0:
            raise UserError("viscosity, hypoviscosity and drag must be >= 0")
        for name, p in (("hyperviscosity", hyperviscosity_order),
                        ("hypoviscosity", hypoviscosity_order)):
            if int(p) != p or p < 1:
                raise UserError(f"the {name} order must be a whole number >= 1")
        super().__init__(grid, viscosity, dealias)
        F = self.fourier
        self.linear = linear_operator(F.k2, F.inverse_k2, viscosity, drag,
                                      hyperviscosity_order, hypoviscosity,
                                      hypoviscosity_order)
        self.forcing = forcing or Forcing3D()
        self.subgrid = subgrid
        self._steady = None
        self._band = None
        if self.forcing.active and self.forcing.kind in ("steady", "modes"):
            self._steady = self.forcing.steady_hat(grid) * self._mask
        elif self.forcing.active:
            self._band = self.forcing.band(grid)

    def initial_state(self, fields: Mapping[str, np.ndarray]) -> np.ndarray:
        """Spectral state from real ``u, v, w``: projected, 2/3 rule (when dealiasing), zero
        mean."""
        F = self.fourier
        missing = [n for n in VELOCITY if n not in fields]
        if missing:
            raise UserError(f"the 3-D coarse solver needs the fields {missing}")
        uh = F.forward(np.stack([np.asarray(fields[n], dtype=float) for n in VELOCITY]))
        uh = project_hat(uh, self.grid) * self._mask
        uh[(slice(None),) + (0,) * 3] = 0.0
        return uh

    def velocity(self, uh: np.ndarray) -> dict[str, np.ndarray]:
        """Real u, v, w."""
        w, v, u = self.fourier.backward(uh)
        return {"u": u, "v": v, "w": w}

    def fields(self, uh: np.ndarray) -> dict[str, np.ndarray]:
        """Real u, v, w and ``vorticity`` (3, nz, ny, nx) with components (x, y, z)."""
        F = self.fourier
        real = F.backward(np.concatenate([uh, self.vorticity_hat(uh)]))
        w, v, u = real[:3]
        oz, oy, ox = real[3:]
        return {"u": u, "v": v, "w": w, "vorticity": np.stack([ox, oy, oz])}

    def energy(self, uh: np.ndarray) -> float:
        """Mean kinetic energy 0.5 <u_i u_i> of a state (Parseval)."""
        F = self.fourier
        return 0.5 * float(np.sum(F.half_weights * np.abs(uh) ** 2)) / F.size**2

    def transfer_density(self, uh: np.ndarray) -> np.ndarray:
        """Per-mode resolved nonlinear energy transfer Re(conj(u_hat) . P[u x omega]_hat) (rfftn
        layout, Parseval weights): shell sums give the transfer spectrum T(k)."""
        F = self.fourier
        n = NavierStokes3D.tendency(self, uh)
        return F.half_weights * np.real(np.sum(np.conj(uh) * n, axis=0)) / F.size**2

    def tendency(self, uh: np.ndarray) -> np.ndarray:
        out = super().tendency(uh)
        extra = None
        if self.subgrid is not None:
            extra = np.asarray(self.subgrid(self.velocity(uh)))
        if self._band is not None:
            e = self.energy(uh * self._band)
            if e > 0:
                push = (self.forcing.amplitude / (2.0 * e)) * uh * self._band
                extra = push if extra is None else extra + push
        if extra is not None:
            out = out + project_hat(extra * self._mask_complex, self.grid)
        if self._steady is not None:
            out = out + self._steady
        return out

    def time_step(self, uh: np.ndarray, cfl: float, max_step: float = math.inf) -> float:
        """The CFL time step of the current state."""
        return cfl_time_step(tuple(self.fourier.backward(uh)), self.grid, cfl, max_step)

    def advance(self, uh: np.ndarray, duration: float, cfl: float, max_step: float = math.inf,
                on_step: Callable[[np.ndarray, float], bool] | None = None,
                max_substeps: int = 1_000_000) -> tuple[np.ndarray, int]:
        """Integrate for ``duration`` s in equal steps set by the CFL number at the start;
        ``on_step(uh, elapsed)`` returning False stops early. Returns (state, steps)."""
        n, dt = substeps(duration, self.time_step(uh, cfl, max_step), max_substeps)
        for i in range(n):
            uh = self.step(uh, dt)
            if on_step is not None and on_step(uh, (i + 1) * dt) is False:
                return uh, i + 1
        return uh, n


def linear_operator(k2: np.ndarray, inverse_k2: np.ndarray, viscosity: float, drag: float,
                    hyperviscosity_order: int, hypoviscosity: float = 0.0,
                    hypoviscosity_order: int = 1) -> np.ndarray:
    """``-nu |k|^(2p) - mu - nu_h |k|^(-2q)`` (the last term 0 at k = 0)."""
    out = -viscosity * k2 ** int(hyperviscosity_order) - drag
    if hypoviscosity:
        out = out - hypoviscosity * inverse_k2 ** int(hypoviscosity_order)
    return out


def vorticity(fields: Mapping[str, np.ndarray], grid: Grid) -> np.ndarray:
    """Vorticity components (x, y, z) of real u, v, w on a periodic (z, y, x) grid."""
    check_grid(grid)
    F = fourier(grid)
    dz, dy, dx = F.ik
    w, v, u = F.forward(np.stack([np.asarray(fields[n], dtype=float) for n in VELOCITY]))
    return F.backward(np.stack([dy * w - dz * v, dz * u - dx * w, dx * v - dy * u]))


def read_forcing_modes(path, ndim: int) -> tuple:
    """A steady forcing as a text table of Fourier modes (``#`` comments, blank or comma
    separated), one mode a row: 2-D ``m_y m_x a b`` adds ``a cos(k.x) + b sin(k.x)`` to the
    vorticity forcing (s^-2); 3-D ``m_z m_y m_x c a b`` adds it to force component ``c``
    (x, y or z; m s^-2), of which the solenoidal part acts. ``k = 2 pi m / L``."""
    from pathlib import Path

    p = Path(path)
    if not p.is_file():
        raise UserError(f"the forcing file {path} does not exist: give modes:FILE with a "
                        "table of Fourier modes")
    need = 4 if ndim == 2 else 6
    rows = []
    for number, line in enumerate(p.read_text().splitlines(), 1):
        line = line.split("#", 1)[0].replace(",", " ").split()
        if not line:
            continue
        if len(line) != need:
            raise UserError(f"{path} line {number}: expected {need} columns ("
                            + ("m_y m_x a b" if ndim == 2 else "m_z m_y m_x component a b")
                            + f"), got {len(line)}")
        try:
            if ndim == 2:
                rows.append((int(line[0]), int(line[1]), float(line[2]), float(line[3])))
            else:
                comp = {"x": 0, "y": 1, "z": 2}.get(line[3].lower())
                if comp is None:
                    raise ValueError(line[3])
                rows.append((int(line[0]), int(line[1]), int(line[2]), comp,
                             float(line[4]), float(line[5])))
        except ValueError:
            raise UserError(f"{path} line {number}: mode numbers must be integers, the "
                            "component x, y or z and the amplitudes numbers") from None
    if not rows:
        raise UserError(f"the forcing file {path} lists no modes")
    return tuple(rows)


def modes_field(rows, grid: Grid, ndim: int) -> np.ndarray:
    """The real forcing field of a mode table on ``grid``: (ny, nx) in 2-D, (3, nz, ny, nx)
    in 3-D with components in grid.dims order (z, y, x)."""
    mesh = grid.mesh()
    top = [n * DEALIAS_FRACTION / 2 for n in grid.shape]
    out = np.zeros(grid.shape if ndim == 2 else (3, *grid.shape))
    for row in rows:
        m = row[:ndim]
        if any(abs(mi) >= t for mi, t in zip(m, top, strict=True)):
            raise UserError(f"the forcing mode {m} is beyond what a "
                            f"{'x'.join(map(str, grid.shape))} grid keeps after dealiasing")
        phase = sum(2 * np.pi * mi / L * x
                    for mi, L, x in zip(m, grid.lengths, mesh, strict=True))
        a, b = row[-2], row[-1]
        value = a * np.cos(phase) + b * np.sin(phase)
        if ndim == 2:
            out += value
        else:
            out[2 - row[3]] += value  # component x, y, z -> index in (z, y, x)
    return out
