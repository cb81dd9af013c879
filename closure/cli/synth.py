"""CLI commands: ``closure synth {burgers,turb2d,turb3d,compressible}``, demo data from our own
solvers."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import typer

from closure.cli.progress import progress_bar
from closure.errors import OptionError

synth_app = typer.Typer(
    name="synth",
    help="Generate demo data with the built-in solvers (netCDF, CF-style).",
    no_args_is_help=True,
)

OUTPUT = typer.Option(..., "-o", "--output", help="netCDF file to write (atomically)")


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    app.add_typer(synth_app, name="synth")


def _run(solver, out: Path, quiet: bool, **options) -> None:
    from closure.synth import write

    if out.exists() and out.is_dir():
        raise OptionError(f"-o {out} is a folder: give a file name such as {out / 'data.nc'}")
    with progress_bar(not quiet) as progress:
        ds = solver(progress=progress, **options)
    path = write(ds, out)
    if not quiet:
        typer.echo(_summary(ds, path))


def _summary(ds, path: Path) -> str:
    dims = [d for d in ("z", "y", "x") if d in ds.dims]
    grid = " x ".join(f"{ds.sizes[d]}" for d in dims)
    names = [n for n in ("u", "v", "w") if n in ds]
    energy = [0.5 * sum(float(np.mean(ds[n].values[i] ** 2)) for n in names)
              for i in (0, ds.sizes["time"] - 1)]
    t = ds["time"].values
    lines = [
        f"{ds.attrs['solver']}: grid {grid} ({', '.join(dims)}), {ds.sizes['time']} snapshots, "
        f"t = {t[0]:g} .. {t[-1]:g} s, {ds.attrs.get('steps', '?')} steps",
        f"kinetic energy 0.5<u_i u_i>: {energy[0]:.4g} -> {energy[1]:.4g} m2 s-2",
        f"variables: {', '.join(ds.data_vars)}",
        *([f"max |k . u_hat| / (|k| |u_hat|): {ds.attrs['max_relative_divergence']:.2g}"]
          if "max_relative_divergence" in ds.attrs else []),
        f"written: {path}",
    ]
    return "\n".join(lines)


@synth_app.command()
def burgers(
    output: Path = OUTPUT,
    n: int = typer.Option(2048, "--n", help="grid points"),
    snapshots: int = typer.Option(16, help="number of stored snapshots"),
    interval: float = typer.Option(0.1, help="time between snapshots (s)"),
    spinup: float = typer.Option(0.0, help="time before the first snapshot (s)"),
    viscosity: float = typer.Option(0.01, help="viscosity nu (m2 s-1)"),
    seed: int = typer.Option(0, help="random seed of the initial field"),
    initial: str = typer.Option("random", help="initial field: random or cole-hopf"),
    amplitude: float = typer.Option(1.0, help="rms (random) or peak (cole-hopf) velocity"),
    modes: int = typer.Option(8, help="highest mode of the random initial field"),
    cfl: float = typer.Option(0.5, help="CFL number of the time step"),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress bar or summary"),
) -> None:
    """1-D viscous Burgers turbulence (pseudo-spectral, dealiased)."""
    from closure.synth import burgers as solver

    _run(solver, output, quiet, n=n, snapshots=snapshots, interval=interval, spinup=spinup,
         viscosity=viscosity, seed=seed, initial=initial, amplitude=amplitude, modes=modes,
         cfl=cfl)


@synth_app.command()
def turb2d(
    output: Path = OUTPUT,
    n: int = typer.Option(128, "--n", help="grid points per direction"),
    snapshots: int = typer.Option(8, help="number of stored snapshots"),
    interval: float = typer.Option(0.5, help="time between snapshots (s)"),
    spinup: float = typer.Option(5.0, help="time before the first snapshot (s)"),
    viscosity: float = typer.Option(1e-3, help="viscosity nu (m2 s-1; m^2p s-1 with "
                                                "--hyperviscosity-order p)"),
    hyperviscosity_order: int = typer.Option(1, help="p in -nu (-laplacian)^p omega"),
    drag: float = typer.Option(0.1, help="linear drag mu (s-1)"),
    forcing: str = typer.Option("shell", help="shell, kolmogorov or none"),
    forcing_wavenumber: float = typer.Option(4.0, help="forcing mode number"),
    forcing_amplitude: float = typer.Option(1.0, help="rms vorticity forcing (s-2; shell) "
                                                      "or force amplitude (m s-2; kolmogorov)"),
    seed: int = typer.Option(0, help="random seed (forcing and initial field)"),
    scalar: bool = typer.Option(False, "--scalar", help="carry a passive scalar c"),
    scalar_gradient: float = typer.Option(1.0, help="mean scalar gradient along y (m-1)"),
    diffusivity: float | None = typer.Option(None, help="scalar diffusivity (m2 s-1; "
                                                         "default: the viscosity)"),
    cfl: float = typer.Option(0.5, help="CFL number of the time step"),
    dealias: bool = typer.Option(True, "--dealias/--no-dealias", help="2/3-rule dealiasing"),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress bar or summary"),
) -> None:
    """Forced 2-D turbulence in vorticity form (pseudo-spectral, RK4)."""
    from closure.synth import turb2d as solver

    _run(solver, output, quiet, n=n, snapshots=snapshots, interval=interval, spinup=spinup,
         viscosity=viscosity, hyperviscosity_order=hyperviscosity_order, drag=drag,
         forcing=forcing, forcing_wavenumber=forcing_wavenumber,
         forcing_amplitude=forcing_amplitude, seed=seed, scalar=scalar,
         scalar_gradient=scalar_gradient, diffusivity=diffusivity, cfl=cfl, dealias=dealias)


@synth_app.command()
def turb3d(
    output: Path = OUTPUT,
    n: int = typer.Option(64, "--n", help="grid points per direction"),
    snapshots: int = typer.Option(4, help="number of stored snapshots"),
    interval: float = typer.Option(0.25, help="time between snapshots (s)"),
    spinup: float = typer.Option(0.0, help="time before the first snapshot (s)"),
    viscosity: float = typer.Option(0.02, help="viscosity nu (m2 s-1)"),
    peak_wavenumber: float = typer.Option(3.0, help="peak mode number of the initial spectrum"),
    initial_energy: float = typer.Option(0.5, help="initial kinetic energy (m2 s-2)"),
    seed: int = typer.Option(0, help="random seed of the initial field"),
    cfl: float = typer.Option(0.5, help="CFL number of the time step"),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress bar or summary"),
) -> None:
    """Decaying 3-D turbulence (pseudo-spectral, rotational form, projected)."""
    from closure.synth import turb3d as solver

    _run(solver, output, quiet, n=n, snapshots=snapshots, interval=interval, spinup=spinup,
         viscosity=viscosity, peak_wavenumber=peak_wavenumber, initial_energy=initial_energy,
         seed=seed, cfl=cfl)


@synth_app.command()
def compressible(
    output: Path = OUTPUT,
    dims: int = typer.Option(2, "--dims", help="2 or 3 space dimensions"),
    n: int = typer.Option(64, "--n", help="grid points per direction"),
    snapshots: int = typer.Option(4, help="number of stored snapshots"),
    interval: float | None = typer.Option(None, help="time between snapshots (s; default: "
                                                     "half the eddy time L/(2 pi u'))"),
    spinup: float = typer.Option(0.0, help="time before the first snapshot (s)"),
    mach: float = typer.Option(0.3, help="initial turbulent Mach number sqrt(<u_i u_i>)/c"),
    reynolds: float = typer.Option(100.0, help="u' L / (2 pi nu); ignored with --viscosity"),
    viscosity: float | None = typer.Option(None, help="kinematic viscosity at the mean state "
                                                      "(m2 s-1)"),
    viscosity_exponent: float = typer.Option(0.76, help="n in mu ~ T^n (0: constant)"),
    temperature: float = typer.Option(300.0, help="mean temperature (K)"),
    density: float = typer.Option(1.2, help="mean density (kg m-3)"),
    gamma: float = typer.Option(1.4, help="ratio of specific heats"),
    gas_constant: float = typer.Option(287.05, help="specific gas constant (J kg-1 K-1)"),
    prandtl: float = typer.Option(0.72, help="Prandtl number"),
    peak_wavenumber: float = typer.Option(3.0, help="peak mode number of the initial spectrum"),
    forcing_rate: float = typer.Option(0.0, help="linear forcing rate A (s-1; 0: decaying)"),
    seed: int = typer.Option(0, help="random seed of the initial field"),
    cfl: float = typer.Option(0.5, help="acoustic CFL number of the time step"),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress bar or summary"),
) -> None:
    """Compressible ideal-gas turbulence: rho, u, v[, w], p, T (pseudo-spectral, RK4)."""
    from closure.synth import compressible as solver

    _run(solver, output, quiet, n=n, dims=dims, snapshots=snapshots, interval=interval,
         spinup=spinup, mach=mach, reynolds=reynolds, viscosity=viscosity,
         viscosity_exponent=viscosity_exponent, temperature=temperature, density=density,
         gamma=gamma, gas_constant=gas_constant, prandtl=prandtl,
         peak_wavenumber=peak_wavenumber, forcing_rate=forcing_rate, seed=seed, cfl=cfl)
