"""Uniform structured grids: spacing, periodicity and wavenumbers, by dimension name."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from closure.errors import UserError

#: Spatial dimension names in array order (xarray convention: (time, z, y, x)).
SPATIAL_DIMS = ("z", "y", "x")
#: The velocity component that goes with each direction.
VELOCITY_OF = {"x": "u", "y": "v", "z": "w"}
DIRECTION_OF = {v: k for k, v in VELOCITY_OF.items()}


@dataclass(frozen=True)
class Grid:
    """A uniform grid over 1, 2 or 3 spatial dimensions.

    ``dims`` are in array order, a subset of ``("z", "y", "x")`` in that order;
    ``spacing`` and ``origin`` are in coordinate units (the file's, e.g. metres).
    A periodic grid has period ``n * spacing`` in every direction.
    """

    dims: tuple[str, ...]
    shape: tuple[int, ...]
    spacing: tuple[float, ...]
    origin: tuple[float, ...] = field(default=())
    periodic: bool = True
    units: str | None = None

    def __post_init__(self):
        if not self.origin:
            object.__setattr__(self, "origin", (0.0,) * len(self.dims))
        if not (len(self.dims) == len(self.shape) == len(self.spacing) == len(self.origin)):
            raise ValueError("Grid dims, shape, spacing and origin must have the same length")
        order = [SPATIAL_DIMS.index(d) for d in self.dims]
        if order != sorted(order):
            raise ValueError(f"Grid dims must be ordered as {SPATIAL_DIMS}, got {self.dims}")

    @classmethod
    def regular(cls, shape, lengths, dims=None, periodic=True, units=None) -> Grid:
        """A periodic box of the given lengths, points at ``i * L / n`` from 0."""
        shape = tuple(int(n) for n in shape)
        dims = tuple(dims) if dims else SPATIAL_DIMS[3 - len(shape):]
        lengths = np.broadcast_to(np.asarray(lengths, dtype=float), (len(shape),))
        spacing = tuple(float(L / n) for L, n in zip(lengths, shape, strict=True))
        return cls(dims, shape, spacing, (0.0,) * len(shape), periodic, units)

    @property
    def ndim(self) -> int:
        return len(self.dims)

    @property
    def lengths(self) -> tuple[float, ...]:
        """Domain length per direction (the period when periodic)."""
        return tuple(n * h for n, h in zip(self.shape, self.spacing, strict=True))

    def axis(self, dim: str) -> int:
        """Array axis of a spatial dimension (of a spatial-only array)."""
        try:
            return self.dims.index(dim)
        except ValueError:
            raise UserError(f"direction {dim!r} is not one of this grid's {self.dims}") from None

    def coords(self, dim: str) -> np.ndarray:
        a = self.axis(dim)
        return self.origin[a] + self.spacing[a] * np.arange(self.shape[a])

    def mesh(self) -> tuple[np.ndarray, ...]:
        """Coordinate arrays broadcast to the full shape, in ``dims`` order."""
        return tuple(np.meshgrid(*(self.coords(d) for d in self.dims), indexing="ij"))

    def wavenumbers(self, dim: str, real: bool = False) -> np.ndarray:
        """Angular wavenumbers 2 pi fftfreq(n, h) (``rfftfreq`` when ``real``), 1-D."""
        a = self.axis(dim)
        n, h = self.shape[a], self.spacing[a]
        f = np.fft.rfftfreq(n, h) if real else np.fft.fftfreq(n, h)
        return 2 * np.pi * f

    def coarsen(self, ratio: int) -> Grid:
        """The grid of every ``ratio``-th point, starting at index 0."""
        for n, d in zip(self.shape, self.dims, strict=True):
            if n < ratio:
                raise UserError(
                    f"the grid has {n} points in {d}, fewer than the ratio {ratio}: "
                    "use a smaller --ratio"
                )
        shape = tuple(-(-n // ratio) for n in self.shape)
        if self.periodic:
            for n, d in zip(self.shape, self.dims, strict=True):
                if n % ratio:
                    raise UserError(
                        f"{n} points in {d} is not a multiple of the ratio {ratio}: on periodic "
                        "data the coarse grid must tile the period; choose a ratio dividing it"
                    )
        spacing = tuple(h * ratio for h in self.spacing)
        return Grid(self.dims, shape, spacing, self.origin, self.periodic, self.units)

    def block(self, ratio: int) -> Grid:
        """The grid of ``ratio``-wide block centres (for block averaging)."""
        for n, d in zip(self.shape, self.dims, strict=True):
            if n < ratio:
                raise UserError(
                    f"the grid has {n} points in {d}, fewer than the ratio {ratio}: "
                    "use a smaller --ratio"
                )
            if n % ratio:
                raise UserError(
                    f"{n} points in {d} is not a multiple of the ratio {ratio}: block "
                    "averaging needs whole blocks; choose a ratio dividing it"
                )
        shape = tuple(n // ratio for n in self.shape)
        spacing = tuple(h * ratio for h in self.spacing)
        origin = tuple(o + 0.5 * (ratio - 1) * h
                       for o, h in zip(self.origin, self.spacing, strict=True))
        return Grid(self.dims, shape, spacing, origin, self.periodic, self.units)

    def to_dict(self) -> dict:
        return {"dims": list(self.dims), "shape": list(self.shape), "spacing": list(self.spacing),
                "origin": list(self.origin), "periodic": self.periodic, "units": self.units}

    @classmethod
    def from_dict(cls, d: dict) -> Grid:
        return cls(tuple(d["dims"]), tuple(d["shape"]), tuple(d["spacing"]),
                   tuple(d.get("origin") or ()), bool(d.get("periodic", True)), d.get("units"))
