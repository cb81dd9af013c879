"""CLI commands for coarse-graining jobs on a service and their products
(``closure submit-coarse-grain``, ``closure products``, ``closure fetch``,
``closure delete-product``), and for filter-width sweeps on the queue
(``closure submit-sweep``, ``closure sweep-report``)."""

from __future__ import annotations

import json
from pathlib import Path

import typer

from closure.cli.inputs import parse_indices, parse_var_options
from closure.cli.service import SERVER, TOKEN, _client
from closure.errors import OptionError


def submit_coarse_grain(
    input: Path = typer.Argument(None, help="netCDF file of fine-grid fields (omit with "
                                 "--dataset)"),
    dataset: str = typer.Option(None, "--dataset", help="an uploaded dataset id instead"),
    spec_file: Path = typer.Option(None, "--spec", help="a coarse-graining spec JSON file; "
                                   "options below override its fields"),
    filter: str = typer.Option(None, "--filter", help="box, gaussian, spectral or block"),
    width: list[float] = typer.Option(None, "--width", help="filter width (grid spacings by "
                                      "default); repeat for several"),
    width_units: str = typer.Option(None, "--width-units", help="grid or coordinate"),
    ratio: list[int] = typer.Option(None, "--ratio", help="coarsening ratio; repeat for "
                                    "several (one setting per width and ratio)"),
    target: list[str] = typer.Option(None, "--target", help="stress, force, vorticity or "
                                     "flux:NAME; repeat (default: every one)"),
    transfer: list[str] = typer.Option(None, "--transfer", help="pi or enstrophy_transfer; "
                                       "repeat (default: every one)"),
    dtype: str = typer.Option(None, "--dtype", help="float64 (default) or float32"),
    format: str = typer.Option(None, "--format", help="netcdf (default) or zarr (big "
                               "products: one zip of a Zarr store, fetched as ID.zarr.zip)"),
    var: list[str] = typer.Option(None, "--var", help="OURS=THEIRS name mapping, e.g. u=U"),
    scalar: list[str] = typer.Option(None, "--scalar", help="passive scalar to carry"),
    snapshots: str = typer.Option(None, "--snapshots", help="time indices, e.g. 0-7 or 0,2,4"),
    non_periodic: bool = typer.Option(False, "--non-periodic",
                                      help="the data are not periodic (real-space filters)"),
    name: str = typer.Option(None, "--name", help="a label for the job"),
    upload: bool = typer.Option(None, "--upload/--by-path", help="always upload the file, or "
                                "never (default: by path when under the server's data roots)"),
    wait: bool = typer.Option(False, "--wait", help="wait for the product and print its id"),
    server: str = SERVER,
    token: str = TOKEN,
) -> None:
    """Submit a coarse-graining job (filtered fields and exact subgrid terms, stored as a
    product); prints the job id as the last line (the product id with --wait)."""
    from closure.client import JobFailedError, coarse_spec_from_options

    if (input is None) == (dataset is None):
        raise OptionError("give an input file or --dataset ID (one of them)")
    base = None
    if spec_file is not None:
        try:
            base = json.loads(spec_file.read_text())
        except (OSError, ValueError) as exc:
            raise OptionError(f"--spec {spec_file}: cannot read a JSON spec ({exc})") from None
    spec = coarse_spec_from_options(
        input, dataset_id=dataset, filter=filter, widths=width or None,
        ratios=ratio or None, width_units=width_units, targets=target or None,
        transfers=transfer or None, dtype=dtype, format=format, variables=parse_var_options(var),
        scalars=scalar or None, snapshots=parse_indices(snapshots),
        periodic=False if non_periodic else None, base=base)
    if input is not None and input.is_file():
        spec["input"]["path"] = str(input.resolve())
    elif input is not None and upload:
        raise OptionError(f"{input}: no such file")
    with _client(server, token) as c:
        doc = c.submit_coarse_grain(spec, name=name, upload=upload)
        if doc.get("reused"):
            typer.echo(f"an identical job exists ({doc['state']}"
                       + (f", product {doc['product_id']}" if doc.get("product_id") else "")
                       + ")")
        if not wait:
            typer.echo(doc["id"])
            return
        try:
            doc = c.wait(doc["id"])
        except JobFailedError as exc:
            typer.echo(f"error: {exc}", err=True)
            raise typer.Exit(1) from None
    typer.echo(f"job {doc['id']} succeeded: product")
    typer.echo(doc["product_id"])


def products(dataset: str = typer.Option(None, "--dataset", help="dataset id or SHA-256"),
             limit: int = typer.Option(50, "--limit"),
             as_json: bool = typer.Option(False, "--json", help="the records as JSON"),
             server: str = SERVER, token: str = TOKEN) -> None:
    """List the stored coarse-grained products."""
    with _client(server, token) as c:
        rows = c.products(dataset=dataset, limit=limit)
    if as_json:
        typer.echo(json.dumps(rows, indent=1))
        return
    if not rows:
        typer.echo("no products")
        return
    typer.echo(f"{'id':<24} {'snapshots':>9} {'size MB':>9} {'dtype':<8} settings")
    for r in rows:
        settings = ", ".join(
            f"{s['kind']} r{s['ratio']}" + (f" w{s['width']:g}" if s.get("width") else "")
            for s in r["settings"])
        typer.echo(f"{r['id']:<24} {r['n_snapshots']:>9} {r['size'] / 1e6:>9.2f} "
                   f"{r['dtype']:<8} {settings}")


def fetch(product_id: str = typer.Argument(..., help="product id"),
          output: Path = typer.Option(None, "-o", "--output", help="file to write, or a "
                                      "folder to write ID.nc (netCDF) or ID.zarr.zip (Zarr) "
                                      "in (default: the current folder)", show_default=False),
          server: str = SERVER, token: str = TOKEN) -> None:
    """Download a product (streamed; its SHA-256 is checked). Open it with
    closure.products.open_product(path, group), or a Zarr product with
    xarray.open_zarr(zarr.storage.ZipStore(path, mode="r"), group=...)."""
    with _client(server, token) as c:
        path = c.fetch(product_id, output)
    typer.echo(f"wrote {path} ({path.stat().st_size / 1e6:.2f} MB)")


def delete_product(product_id: str = typer.Argument(..., help="product id"),
                   server: str = SERVER, token: str = TOKEN) -> None:
    """Delete a stored product."""
    with _client(server, token) as c:
        c.delete_product(product_id)
    typer.echo(f"deleted {product_id}")


def submit_sweep(
    input: Path = typer.Argument(..., help="netCDF file of fine-grid fields"),
    widths: str = typer.Option(..., "--widths", help="filter widths, e.g. 4,8,16 (grid "
                               "spacings by default)"),
    ratios: str = typer.Option(None, "--ratios", help="one ratio for all widths or one per "
                               "width (default: width / 2)"),
    spec_file: Path = typer.Option(None, "--spec", help="the discovery spec JSON to sweep"),
    filter: str = typer.Option(None, "--filter", help="box, gaussian, spectral or block"),
    filters: str = typer.Option(None, "--filters", help="several filter kinds to sweep, "
                                "each at every width, e.g. gaussian,box"),
    target: str = typer.Option(None, "--target", help="stress, force, vorticity or flux:NAME"),
    resamples: int = typer.Option(None, "--resamples", help="resamples for uncertainty"),
    seed: int = typer.Option(None, "--seed"),
    name: str = typer.Option(None, "--name", help="a label for the job"),
    wait: bool = typer.Option(False, "--wait", help="wait and print the sweep id"),
    server: str = SERVER,
    token: str = TOKEN,
) -> None:
    """Submit a filter-width sweep (one discovery per width, spread over the workers);
    prints the job id as the last line (the sweep id with --wait)."""
    from closure.client import JobFailedError, spec_from_options

    def numbers(text: str, kind, flag: str) -> list:
        try:
            return [kind(x) for x in text.split(",") if x.strip()]
        except ValueError:
            raise OptionError(f"{flag} {text!r}: give numbers separated by commas") from None

    base = None
    if spec_file is not None:
        try:
            base = json.loads(spec_file.read_text())
        except (OSError, ValueError) as exc:
            raise OptionError(f"--spec {spec_file}: cannot read a JSON spec ({exc})") from None
    spec = spec_from_options(input.resolve() if input.is_file() else input, filter=filter,
                             target=target, resamples=resamples, seed=seed, base=base)
    with _client(server, token) as c:
        doc = c.submit_sweep(spec, numbers(widths, float, "--widths"),
                             ratios=numbers(ratios, int, "--ratios") if ratios else None,
                             filters=[f.strip() for f in filters.split(",") if f.strip()]
                             if filters else None, name=name)
        if not wait:
            typer.echo(doc["id"])
            return
        try:
            doc = c.wait(doc["id"])
        except JobFailedError as exc:
            typer.echo(f"error: {exc}", err=True)
            raise typer.Exit(1) from None
        result = c.sweep(doc["sweep_id"])
    for part in result.get("by_filter") or [result]:
        for e, model_id in zip(part["entries"], part["model_ids"], strict=True):
            r2 = e["test_scores"].get("r2")
            typer.echo(f"{e['filter'].get('kind', '')} D = {e['delta']:.4g} (ratio "
                       f"{e['ratio']}): model {model_id}, held-out "
                       f"R^2 {'-' if r2 is None else format(r2, '.3f')}")
    typer.echo("a priori skill does not guarantee a stable or accurate coarse simulation")
    typer.echo(doc["sweep_id"])


def sweep_report(sweep_id: str = typer.Argument(..., help="sweep id (sw-...)"),
                 output: Path = typer.Option(..., "-o", "--output", help="report folder to "
                                             "write (index.html + PNGs; an earlier report "
                                             "there is replaced)", show_default=False),
                 server: str = SERVER, token: str = TOKEN) -> None:
    """Download a stored sweep's HTML report (built by the server): the first width's model
    with the scaled coefficients and held-out scores against the filter width. A priori skill
    does not guarantee a stable or accurate coarse simulation."""
    with _client(server, token) as c:
        out = c.download_sweep_report(sweep_id, output)
    typer.echo(str(out / "index.html"))


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    app.command("submit-coarse-grain")(submit_coarse_grain)
    app.command("products")(products)
    app.command("fetch")(fetch)
    app.command("delete-product")(delete_product)
    app.command("submit-sweep")(submit_sweep)
    app.command("sweep-report")(sweep_report)
