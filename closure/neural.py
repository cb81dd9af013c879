"""The neural reference closure: a small convolutional network beside the sparse model.

How much skill does the closed form leave on the table? A black-box network trained on the
same coarse training snapshots, from the same inputs (the resolved velocity gradients as the
library sees them: coarse fields, the job's derivative scheme) to the same target, and scored
on the same held-out snapshots with the same a priori scores, answers that. Convolutional
networks on coarse-grained data are the usual black-box reference for subgrid closures (from
memory: Zanna & Bolton 2020, Geophys. Res. Lett. 47; Guan et al. 2022, J. Comput. Phys. 458).

The network: ``depth`` convolutions of ``width`` channels and odd ``kernel`` size (Conv1d/2d/3d
by the grid's dimension), GELU between them, circular padding on periodic grids (replicate
otherwise), so the output has the coarse grid's shape and the network is translation
equivariant like the library's terms. Inputs are scaled by one training RMS per group (all
velocity gradients share one, each scalar's gradient its own, which keeps rotations of the
axes meaningful); outputs are one pooled training RMS times the network's output plus each
component's training mean, so the loss is proportional to the weighted squared error that
the sparse fit minimises (component weights of ``closure.library.component_weights``).

Reproducible on CPU: ``torch.manual_seed``, deterministic algorithms, a fixed thread count,
and a seeded shuffle; a run stopped by its ``epochs`` budget gives the same weights bit for
bit (a run stopped by its ``seconds`` budget depends on the machine's speed; the record says
which budget stopped it).

Stored form (:meth:`ReferenceNet.to_dict`, the model file's ``reference_net`` section): the
architecture, the input channel names, the normalisation, the training settings and record,
and the state dict as raw little-endian float32 bytes in base64, one entry per tensor with its
shape (plain JSON, no pickles; about 0.1 MB for the default 2-D network, 0.3 MB in 3-D).

torch is optional: this module imports it only when a network is trained or loaded, and
:func:`require_torch` raises a UserError saying how to install it.
"""

from __future__ import annotations

import base64
import contextlib
import hashlib
import math
import time
from collections.abc import Callable, Iterable, Mapping, Sequence

import numpy as np

from closure.derivatives import derivative
from closure.errors import UserError
from closure.grid import VELOCITY_OF, Grid

Progress = Callable[[str, int, int], None]

#: the one torch specifier that installs the CPU build on these machines
TORCH_REQUIREMENT = "torch==2.13.0"
INSTALL_HINT = f"install the neural extra: pip install {TORCH_REQUIREMENT}"
#: the name of the network's column in the scores (``scores["reference_net_test"]``)
SCORES_KEY = "reference_net_test"
ARCHITECTURE_KIND = "convolutional"


def require_torch():
    """The torch module, or a UserError that says how to install it."""
    try:
        import torch
    except ImportError:
        raise UserError(f"the neural reference closure (--reference-net, reference_net.enabled) "
                        f"needs torch, which is not installed: {INSTALL_HINT}") from None
    return torch


def _no_progress(phase: str, done: int, total: int) -> None:
    pass


# ---------------------------------------------------------------------- inputs
def input_names(target: str, dims: Sequence[str]) -> list[str]:
    """Names of the input channels: ``d_j u_i`` for every velocity component and direction,
    then ``d_j c`` for a flux target's scalar ``c``."""
    names = [f"d_{j} {VELOCITY_OF[i]}" for i in dims for j in dims]
    if target.startswith("flux:"):
        c = target.split(":", 1)[1]
        names += [f"d_{j} {c}" for j in dims]
    return names


def input_groups(target: str, dims: Sequence[str]) -> list[int]:
    """Normalisation group of each input channel: 0 for velocity gradients, 1 for a scalar's."""
    n = len(dims)
    return [0] * (n * n) + ([1] * n if target.startswith("flux:") else [])


def network_inputs(target: str, fields: Mapping[str, np.ndarray], grid: Grid,
                   scheme: str) -> np.ndarray:
    """The input channels (C, *grid.shape), float64, in :func:`input_names` order: first
    derivatives of the coarse fields with the job's scheme."""
    missing = [VELOCITY_OF[d] for d in grid.dims if VELOCITY_OF[d] not in fields]
    if missing:
        raise UserError(f"the reference network needs the velocity components {missing}, "
                        "which the coarse fields lack: read them (--var)")
    chans = [derivative(fields[VELOCITY_OF[i]], grid, j, 1, scheme)
             for i in grid.dims for j in grid.dims]
    if target.startswith("flux:"):
        c = target.split(":", 1)[1]
        chans += [derivative(fields[c], grid, j, 1, scheme) for j in grid.dims]
    return np.stack([np.asarray(a, dtype=np.float64) for a in chans])


# ---------------------------------------------------------------------- the network
def architecture(settings, ndim: int, in_channels: int, out_channels: int,
                 periodic: bool) -> dict:
    """The architecture record of a network built from ``settings`` (a ReferenceNetSpec)."""
    return {"kind": ARCHITECTURE_KIND, "ndim": int(ndim), "in_channels": int(in_channels),
            "out_channels": int(out_channels), "width": int(settings.width),
            "depth": int(settings.depth), "kernel": int(settings.kernel),
            "activation": "gelu", "padding": "circular" if periodic else "replicate"}


def build_module(arch: Mapping):
    """The torch module of an architecture record (float32, freshly initialised)."""
    torch = require_torch()
    if arch.get("kind") != ARCHITECTURE_KIND:
        raise UserError(f"unknown reference network kind {arch.get('kind')!r}: this closure "
                        f"knows {ARCHITECTURE_KIND!r}")
    conv = {1: torch.nn.Conv1d, 2: torch.nn.Conv2d, 3: torch.nn.Conv3d}[int(arch["ndim"])]
    k = int(arch["kernel"])
    sizes = ([int(arch["in_channels"])] + [int(arch["width"])] * (int(arch["depth"]) - 1)
             + [int(arch["out_channels"])])
    layers = []
    for n, (a, b) in enumerate(zip(sizes[:-1], sizes[1:], strict=True)):
        layers.append(conv(a, b, k, padding=k // 2, padding_mode=arch["padding"]))
        if n < len(sizes) - 2:
            layers.append(torch.nn.GELU())
    return torch.nn.Sequential(*layers)


@contextlib.contextmanager
def _reproducible(torch, seed: int, threads: int):
    """Seed torch, make its algorithms deterministic and fix its thread count for the block,
    restoring the previous settings afterwards."""
    was_deterministic = torch.are_deterministic_algorithms_enabled()
    was_threads = torch.get_num_threads()
    torch.use_deterministic_algorithms(True)
    torch.set_num_threads(int(threads))
    torch.manual_seed(int(seed))
    try:
        yield
    finally:
        torch.use_deterministic_algorithms(was_deterministic)
        torch.set_num_threads(was_threads)


def _encode_state(module) -> dict:
    """State dict as {name: {shape, data}} with float32 little-endian bytes in base64, and the
    SHA-256 of all the bytes in order (two equal digests: equal weights)."""
    tensors, digest = {}, hashlib.sha256()
    for name, t in module.state_dict().items():
        a = np.ascontiguousarray(t.detach().cpu().numpy().astype("<f4"))
        raw = a.tobytes()
        digest.update(raw)
        tensors[name] = {"shape": list(a.shape), "data": base64.b64encode(raw).decode("ascii")}
    return {"dtype": "float32", "tensors": tensors, "sha256": digest.hexdigest()}


def _decode_state(torch, state: Mapping) -> dict:
    out = {}
    for name, rec in state["tensors"].items():
        a = np.frombuffer(base64.b64decode(rec["data"]), dtype="<f4")
        shape = tuple(int(s) for s in rec["shape"])
        if a.size != math.prod(shape):
            raise UserError(f"the reference network's tensor {name} holds {a.size} values for "
                            f"shape {shape}: the model file is damaged")
        out[name] = torch.from_numpy(a.reshape(shape).astype(np.float32))
    return out


class ReferenceNet:
    """A trained reference network with what it needs to be evaluated on coarse fields.

    ``predict(fields, grid)`` returns the modelled target components like
    :meth:`closure.model.ClosureModel.evaluate`.
    """

    def __init__(self, module, *, arch: Mapping, target: str, components: Sequence[str],
                 dims: Sequence[str], scheme: str, inputs: Sequence[str],
                 input_scale: Sequence[float], output_mean: Sequence[float],
                 output_scale: float, training: Mapping):
        self.module = module
        self.arch = dict(arch)
        self.target = target
        self.components = list(components)
        self.dims = tuple(dims)
        self.scheme = scheme
        self.inputs = list(inputs)
        self.input_scale = np.asarray(input_scale, dtype=np.float64)
        self.output_mean = np.asarray(output_mean, dtype=np.float64)
        self.output_scale = float(output_scale)
        self.training = dict(training)

    @property
    def n_parameters(self) -> int:
        return int(sum(p.numel() for p in self.module.parameters()))

    def predict(self, fields: Mapping[str, np.ndarray], grid: Grid) -> dict[str, np.ndarray]:
        """The modelled target components on ``grid`` (float64 arrays of grid.shape)."""
        torch = require_torch()
        if tuple(grid.dims) != self.dims:
            raise UserError(f"the reference network is for a grid with dims {self.dims}; these "
                            f"fields have {tuple(grid.dims)}")
        x = network_inputs(self.target, fields, grid, self.scheme)
        x = (x / self.input_scale.reshape(-1, *[1] * grid.ndim)).astype(np.float32)
        was_threads = torch.get_num_threads()
        torch.set_num_threads(int(self.training.get("threads", 1)))
        try:
            with torch.no_grad():
                y = self.module(torch.from_numpy(x)[None])[0].numpy().astype(np.float64)
        finally:
            torch.set_num_threads(was_threads)
        return {c: y[k] * self.output_scale + self.output_mean[k]
                for k, c in enumerate(self.components)}

    #: the name the coarse solver (closure.les.subgrid_term) and the report call
    evaluate = predict

    def weights_sha256(self) -> str:
        return _encode_state(self.module)["sha256"]

    def to_dict(self) -> dict:
        """The model file's ``reference_net`` section (plain JSON)."""
        return {
            "architecture": dict(self.arch),
            "target": self.target,
            "components": list(self.components),
            "dims": list(self.dims),
            "scheme": self.scheme,
            "inputs": list(self.inputs),
            "normalization": {"input_scale": [float(v) for v in self.input_scale],
                              "output_mean": [float(v) for v in self.output_mean],
                              "output_scale": float(self.output_scale)},
            "training": dict(self.training),
            "parameters": self.n_parameters,
            "state": _encode_state(self.module),
        }

    @classmethod
    def from_dict(cls, d: Mapping) -> ReferenceNet:
        """Rebuild from :meth:`to_dict` output (needs torch)."""
        torch = require_torch()
        module = build_module(d["architecture"])
        try:
            module.load_state_dict(_decode_state(torch, d["state"]))
        except (RuntimeError, KeyError) as exc:
            raise UserError(f"the reference network's weights do not fit its architecture: "
                            f"{exc}") from None
        module.eval()
        norm = d["normalization"]
        return cls(module, arch=d["architecture"], target=d["target"],
                   components=d["components"], dims=d["dims"], scheme=d["scheme"],
                   inputs=d["inputs"], input_scale=norm["input_scale"],
                   output_mean=norm["output_mean"], output_scale=norm["output_scale"],
                   training=d["training"])


# ---------------------------------------------------------------------- training
def _scales(x: np.ndarray, groups: Sequence[int], mask: np.ndarray | None = None) -> np.ndarray:
    """One RMS per group of channels over every snapshot and point of ``x`` (N, C, ...), or
    over the points where ``mask`` (N, 1, ...) is 1."""
    groups = np.asarray(groups)
    scale = np.ones(x.shape[1])
    for g in np.unique(groups):
        sq = x[:, groups == g] ** 2
        rms = float(np.sqrt(np.mean(sq) if mask is None
                            else np.sum(sq * mask) / (sq.shape[1] * np.sum(mask))))
        scale[groups == g] = rms if rms > 0 and math.isfinite(rms) else 1.0
    return scale


def train_reference_net(snapshots: Iterable[tuple], grid: Grid,
                        target: str, scheme: str, components: Sequence[str],
                        weights: Sequence[float], settings,
                        progress: Progress | None = None) -> ReferenceNet:
    """Train a network on ``snapshots``: (coarse fields, exact target components[, valid])
    of the training snapshots on the coarse ``grid``. ``valid`` (booleans of the grid's shape,
    or None for every point) marks the points the sparse fit uses on data with land: the loss
    and the normalisation take those points only, as the sparse fit's statistics do, while
    the network still sees its inputs (zero on land) around them. ``settings``: a
    :class:`closure.spec.ReferenceNetSpec`. Progress phase ``"network"`` counts epochs.

    Memory: every training snapshot's inputs and targets in float32 at once.
    """
    torch = require_torch()
    progress = progress or _no_progress
    components = list(components)
    xs, ys, ms = [], [], []
    for fields, targets, *rest in snapshots:
        valid = rest[0] if rest else None
        xs.append(network_inputs(target, fields, grid, scheme))
        ys.append(np.stack([np.asarray(targets[c], dtype=np.float64) for c in components]))
        ms.append(np.ones(grid.shape) if valid is None
                  else np.asarray(valid, dtype=bool).reshape(grid.shape).astype(np.float64))
    if not xs:
        raise UserError("the reference network needs at least one training snapshot")
    x, y, m = np.stack(xs), np.stack(ys), np.stack(ms)[:, None]
    del xs, ys, ms
    masked = not bool(np.all(m == 1.0))
    if not m.any():
        raise UserError("no training point of the reference network is valid (every coarse "
                        "point touches land): use a smaller filter width or ratio, or leave "
                        "out --reference-net")
    w = np.asarray(weights, dtype=np.float64)
    in_scale = _scales(x, input_groups(target, grid.dims), m if masked else None)
    axes = tuple(a for a in range(y.ndim) if a != 1)
    count = float(np.sum(m))
    out_mean = np.sum(y * m, axis=axes) / count
    shape = (1, -1, *[1] * grid.ndim)
    centred = (y - out_mean.reshape(shape)) * m  # nothing to learn where the fit has no point
    out_scale = float(np.sqrt(np.sum(w * np.sum(centred**2, axis=axes) / count) / w.sum()))
    if not (out_scale > 0 and math.isfinite(out_scale)):
        raise UserError("the training target is constant or not finite: the reference network "
                        "has nothing to learn")
    arch = architecture(settings, grid.ndim, x.shape[1], len(components), grid.periodic)
    started = time.monotonic()
    with _reproducible(torch, settings.seed, settings.threads):
        module = build_module(arch)
        X = torch.from_numpy((x / in_scale.reshape(shape)).astype(np.float32))
        Y = torch.from_numpy((centred / out_scale).astype(np.float32))
        W = torch.from_numpy((w / w.sum()).astype(np.float32)).reshape(shape)
        M = torch.from_numpy(m.astype(np.float32))
        per_point = float(np.prod(grid.shape))
        del x, centred
        optimiser = torch.optim.Adam(module.parameters(), lr=settings.learning_rate)
        schedule = torch.optim.lr_scheduler.CosineAnnealingLR(optimiser, settings.epochs)
        shuffle = torch.Generator().manual_seed(int(settings.seed))
        n = X.shape[0]
        batch = min(int(settings.batch), n)
        epochs = int(settings.epochs)
        stopped_by, epoch, loss_value = "epochs", 0, float("nan")
        progress("network", 0, epochs)
        for epoch in range(1, epochs + 1):
            order = torch.randperm(n, generator=shuffle)
            total = 0.0
            for start in range(0, n, batch):
                idx = order[start:start + batch]
                optimiser.zero_grad()
                err = module(X[idx]) - Y[idx]
                # weighted mean square over components, mean over the valid points of the
                # batch (every point without land)
                sq = (W * err.pow(2) * M[idx]).sum(dim=1)
                # (a batch whose snapshots have no valid point contributes nothing)
                loss = sq.sum() / M[idx].sum().clamp_min(1.0) if masked else sq.mean()
                loss.backward()
                optimiser.step()
                total += float(loss.detach()) * len(idx)
            schedule.step()
            loss_value = total / n
            progress("network", epoch, epochs)
            if not math.isfinite(loss_value):
                raise UserError("the reference network's training diverged (non-finite loss): "
                                "lower reference_net.learning_rate")
            if time.monotonic() - started > settings.seconds and epoch < epochs:
                stopped_by = "seconds"
                break
        module.eval()
    training = {
        "epochs": epochs, "seconds": float(settings.seconds), "epochs_run": int(epoch),
        "stopped_by": stopped_by, "elapsed_seconds": round(time.monotonic() - started, 3),
        "learning_rate": float(settings.learning_rate), "batch": int(settings.batch),
        "optimizer": "adam, cosine learning-rate decay over the epochs",
        "loss": "component-weighted mean square error of the normalised target",
        "final_loss": float(loss_value), "seed": int(settings.seed),
        "threads": int(settings.threads), "snapshots": int(n),
        "points": int(count) if masked else int(n * per_point),
        "masked": masked,
        "torch": str(torch.__version__),
    }
    return ReferenceNet(module, arch=arch, target=target, components=components,
                        dims=grid.dims, scheme=scheme, inputs=input_names(target, grid.dims),
                        input_scale=in_scale, output_mean=out_mean, output_scale=out_scale,
                        training=training)


__all__ = ["INSTALL_HINT", "SCORES_KEY", "ReferenceNet", "input_names", "network_inputs",
           "require_torch", "train_reference_net"]
