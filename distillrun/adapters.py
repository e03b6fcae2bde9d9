"""Adapter students: the frozen teacher plus trainable low-rank weight changes (low-rank adaptation, Hu et al. 2021).

A chosen Linear or Conv2d weight W (out, in) -- a Conv2d weight (out, in/groups, kh, kw) is read as the matrix
(out, in/groups * kh * kw) -- is replaced, through torch.nn.utils.parametrize, by

    W + (scale / rank) * factor_out @ factor_in,    factor_out: (out, rank), factor_in: (rank, in),

so only rank * (out + in) numbers per layer train and need saving. factor_out starts at zero (Hu et al. 2021,
Sec. 4.1), so a freshly adapted network computes exactly what the teacher computes; factor_in starts Gaussian
with standard deviation 1 / sqrt(in) (Hu et al. use a random Gaussian; the 1 / sqrt(fan-in) scale is common
practice, from memory).

What lives here:
  AdapterSpec            rank, scale, which layers (glob patterns over module names) and which extra
                         parameters train whole (e.g. a guidance embedding)
  attach / adapted       put adapters on a network, find them again
  merge / unmerge        write teacher + change into the plain weights (for speed) and restore the teacher
                         exactly (the teacher's weights are kept, because subtracting the change again is not
                         exact in floating point)
  merged_copy            a plain network without parametrizations (the "one file" export)
  base_digest            content hash of the teacher's own weights, which an adapter names as its base
  Adapter                an adapter detached from any network: extract, save, read, apply (with a scale, to
                         any teacher of the same architecture), combine (a scaled sum of weight changes)

Errors about the user's input are AdapterError: one line naming the key or file and what would be valid.
"""
from __future__ import annotations

import copy
import fnmatch
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Mapping

import torch
from torch import nn
from torch.nn.utils import parametrize

from .checkpoint import tensor_digest

ADAPTER_FORMAT = "distillrun-adapter/1"
HEADER_KEY = "distillrun.adapter"  # safetensors header entry holding the JSON description
KINDS = {nn.Linear: "linear", nn.Conv2d: "conv2d"}


class AdapterError(ValueError):
    """An adapter setting or file that cannot be used; str() is the one line shown to the user."""


@dataclass
class AdapterSpec:
    rank: int = 8
    scale: float | None = None  # alpha of Hu et al. 2021: the change is (scale / rank) B A; None: scale = rank
    layers: list[str] = field(default_factory=lambda: ["*"])  # globs over module names, e.g. "blocks.*.inner"
    skip: list[str] = field(default_factory=list)  # globs of layers left out even when `layers` matches them
    train_also: list[str] = field(default_factory=list)  # globs over parameter names trained and saved whole
    seed: int = 0  # of factor_in's initial draw

    def gain(self) -> float:
        return float(self.scale if self.scale is not None else self.rank) / self.rank


def check_spec(spec: AdapterSpec, prefix: str = "adapter") -> None:
    """One-line AdapterError for values that cannot work (no network needed)."""
    if isinstance(spec.rank, bool) or not isinstance(spec.rank, int) or spec.rank < 1:
        raise AdapterError(f"{prefix}.rank={spec.rank!r}: must be a whole number >= 1")
    if spec.scale is not None and not (isinstance(spec.scale, (int, float)) and math.isfinite(spec.scale)
                                       and spec.scale > 0):
        raise AdapterError(f"{prefix}.scale={spec.scale!r}: must be a finite number > 0, or null (= rank)")
    for key in ("layers", "skip", "train_also"):
        value = getattr(spec, key)
        if isinstance(value, str) or not all(isinstance(p, str) and p for p in value):
            raise AdapterError(f"{prefix}.{key}={value!r}: must be a list of non-empty glob patterns, "
                               "e.g. ['blocks.*.inner', 'out']")
    if not list(spec.layers):
        raise AdapterError(f"{prefix}.layers=[]: must name at least one layer pattern, e.g. ['*'] for every "
                           "Linear and Conv2d layer")


# --------------------------------------------------------------------------------------- the parametrization
class LowRankDelta(nn.Module):
    """Parametrization W -> W + gain * (factor_out @ factor_in).view(W.shape). While `merged`, the weight
    tensor already holds that sum and the teacher's own weight waits in `base`; forward then returns W."""

    def __init__(self, weight_shape, rank: int, gain: float, generator: torch.Generator | None = None,
                 dtype=torch.float32, device=None):
        super().__init__()
        out, fan_in = int(weight_shape[0]), int(math.prod(weight_shape[1:]))
        generator = generator if generator is not None else torch.Generator().manual_seed(0)  # global RNG untouched
        init = torch.randn((rank, fan_in), generator=generator, dtype=torch.float64) / math.sqrt(fan_in)
        self.factor_in = nn.Parameter(init.to(dtype=dtype, device=device))
        self.factor_out = nn.Parameter(torch.zeros((out, rank), dtype=dtype, device=device))
        self.weight_shape = tuple(int(s) for s in weight_shape)
        self.gain = float(gain)
        self.merged = False
        self.base: torch.Tensor | None = None  # the teacher's weight while merged (not in the state dict)

    @property
    def rank(self) -> int:
        return self.factor_in.shape[0]

    def delta(self) -> torch.Tensor:
        """The weight change, shaped like the weight."""
        return (self.gain * (self.factor_out @ self.factor_in)).view(self.weight_shape)

    def forward(self, weight: torch.Tensor) -> torch.Tensor:
        if self.merged:
            return weight
        out = weight + self.delta()
        if out.stride() != weight.stride():
            # keep the weight's exact strides (channels-last kernels with size-1 dims pick their algorithm by
            # them): the zero-initialised student then runs the teacher's very kernels, bit for bit
            out = torch.empty_strided(weight.shape, weight.stride(), dtype=out.dtype, device=out.device).copy_(out)
        return out


def _ours(module: nn.Module) -> LowRankDelta | None:
    if not parametrize.is_parametrized(module, "weight"):
        return None
    plist = module.parametrizations["weight"]
    return plist[0] if len(plist) == 1 and isinstance(plist[0], LowRankDelta) else None


def adapted(net: nn.Module) -> dict[str, LowRankDelta]:
    """{module name: its LowRankDelta} for every adapted layer of net, in module order."""
    return {name: p for name, m in net.named_modules() if (p := _ours(m)) is not None}


def candidate_layers(net: nn.Module) -> dict[str, nn.Module]:
    """Layers an adapter can sit on: every Linear and Conv2d (subclasses included), by module name."""
    return {name: m for name, m in net.named_modules() if name and isinstance(m, tuple(KINDS))}


def _kind(module: nn.Module) -> str:
    return next(k for cls, k in KINDS.items() if isinstance(module, cls))


def select_layers(net: nn.Module, patterns: Iterable[str], skip: Iterable[str] = (), prefix: str = "adapter") -> list[str]:
    """Names of the Linear/Conv2d layers matched by any pattern and by no skip pattern. A pattern that matches
    no such layer is an AdapterError naming it (a typo would otherwise silently train fewer layers)."""
    layers = candidate_layers(net)
    if not layers:
        raise AdapterError(f"{prefix}.layers: the network has no Linear or Conv2d layer to adapt")
    chosen: list[str] = []
    for pattern in patterns:
        hits = [n for n in layers if fnmatch.fnmatchcase(n, pattern)]
        if not hits:
            shown = ", ".join(list(layers)[:6]) + (", ..." if len(layers) > 6 else "")
            raise AdapterError(f"{prefix}.layers: pattern {pattern!r} matches no Linear or Conv2d layer; "
                               f"layer names look like: {shown}")
        chosen += [n for n in hits if n not in chosen]
    for pattern in skip:
        if not any(fnmatch.fnmatchcase(n, pattern) for n in chosen):
            raise AdapterError(f"{prefix}.skip: pattern {pattern!r} matches none of the chosen layers")
    chosen = [n for n in chosen if not any(fnmatch.fnmatchcase(n, p) for p in skip)]
    if not chosen:
        raise AdapterError(f"{prefix}.skip: leaves no layer to adapt")
    order = list(layers)
    return sorted(chosen, key=order.index)


def _add(module: nn.Module, name: str, rank: int, gain: float, generator) -> LowRankDelta:
    if parametrize.is_parametrized(module, "weight"):
        raise AdapterError(f"layer '{name}': its weight is already parametrized (an adapter is on it, or the "
                           "network's own parametrization); merge or remove it first")
    w = module.weight
    p = LowRankDelta(w.shape, rank, gain, generator, dtype=w.dtype, device=w.device)
    parametrize.register_parametrization(module, "weight", p, unsafe=True)  # unsafe: skip a trial forward
    return p


def attach(net: nn.Module, spec: AdapterSpec, prefix: str = "adapter") -> list[str]:
    """Put fresh adapters (factor_out = 0) on the layers spec selects; freeze everything else except
    spec.train_also. Returns the adapted layer names. The network computes exactly what it did before."""
    check_spec(spec, prefix)
    names = select_layers(net, spec.layers, spec.skip, prefix)
    modules = dict(net.named_modules())
    g = torch.Generator().manual_seed(int(spec.seed))
    for name in names:
        _add(modules[name], name, spec.rank, spec.gain(), g)
    set_trainable(net, spec.train_also, prefix)
    return names


def whole_parameter_names(net: nn.Module, train_also: Iterable[str], prefix: str = "adapter") -> list[str]:
    """Canonical names (see base_state) of the parameters that `train_also` patterns select."""
    plain = _plain_parameter_names(net)
    names = [n for n in base_state(net) if n in plain]
    chosen = []
    for pattern in train_also:
        hits = [n for n in names if fnmatch.fnmatchcase(n, pattern)]
        if not hits:
            raise AdapterError(f"{prefix}.train_also: pattern {pattern!r} matches no parameter of the network "
                               f"(names look like: {', '.join(names[:4])}, ...)")
        chosen += [n for n in hits if n not in chosen]
    return chosen


def _plain_parameter_names(net: nn.Module) -> set[str]:
    """Parameter names, with an adapted weight listed under its plain name (layer.weight)."""
    out = set()
    for name, _ in net.named_parameters():
        if ".parametrizations.weight." in f".{name}":
            head, _, tail = name.partition("parametrizations.weight.")
            if tail == "original":
                out.add(f"{head}weight")
            continue
        out.add(name)
    return out


def _parameter(net: nn.Module, canonical: str) -> nn.Parameter:
    """The tensor that holds canonical parameter `canonical` (an adapted layer's teacher weight included)."""
    module_name, _, leaf = canonical.rpartition(".")
    module = net.get_submodule(module_name) if module_name else net
    if leaf == "weight" and _ours(module) is not None:
        return module.parametrizations["weight"].original
    return getattr(module, leaf)


def set_trainable(net: nn.Module, train_also: Iterable[str] = (), prefix: str = "adapter") -> None:
    """Only adapter factors and the train_also parameters require gradients."""
    net.requires_grad_(False)
    for p in adapted(net).values():
        p.factor_in.requires_grad_(True)
        p.factor_out.requires_grad_(True)
    for name in whole_parameter_names(net, train_also, prefix):
        _parameter(net, name).requires_grad_(True)


def trainable_count(net: nn.Module) -> int:
    return sum(p.numel() for p in net.parameters() if p.requires_grad)


# ------------------------------------------------------------------------------------------ merge, export
@torch.no_grad()
def merge(net: nn.Module) -> None:
    """Write teacher + change into every adapted weight (a forward pass then costs what the teacher's does)
    and keep the teacher's weights for `unmerge`. The merged weight is computed by the same expression as the
    unmerged forward pass, so outputs are identical bit for bit."""
    for layer, p in adapted(net).items():
        if p.merged:
            continue
        original = net.get_submodule(layer).parametrizations["weight"].original
        p.base = original.detach().clone()
        original.copy_(original + p.delta())
        p.merged = True


@torch.no_grad()
def unmerge(net: nn.Module) -> None:
    """Put the teacher's exact weights back (after `merge`); the adapters apply again on the fly."""
    for layer, p in adapted(net).items():
        if not p.merged:
            continue
        net.get_submodule(layer).parametrizations["weight"].original.copy_(p.base)
        p.base, p.merged = None, False


def merged_copy(net: nn.Module) -> nn.Module:
    """A copy of net with every adapter folded into a plain weight and the parametrizations removed: the
    state dict has the teacher's keys, so it loads wherever the teacher's weights load. The original is untouched.
    (Not parametrize.remove_parametrizations on a deep copy: the copy shares its generated module class with the
    original, and removing the parametrization deletes the class's `weight` property, which breaks the original.)"""
    out = copy.deepcopy(net)
    for layer in adapted(out):
        module = out.get_submodule(layer)
        with torch.no_grad():
            weight = module.weight.detach().clone()  # the parametrized value: teacher + change, strides kept
        del module._modules["parametrizations"]
        module.__class__ = module.__class__.__bases__[0]  # the layer's own class (Linear, Conv2d, a subclass)
        module.weight = nn.Parameter(weight)
    out.requires_grad_(False)
    return out


# ------------------------------------------------------------------------------------------ base identity
def base_state(net: nn.Module) -> dict[str, torch.Tensor]:
    """The state dict net would have without its adapters: the teacher's weights under the teacher's names
    (a merged layer contributes its kept teacher weight, not the sum)."""
    ours = adapted(net)
    out = {}
    for key, value in net.state_dict().items():
        head, sep, tail = key.partition("parametrizations.weight.")
        if sep:
            layer = head[:-1]
            if layer not in ours:
                out[key] = value  # a parametrization that is not ours: kept as it is
            elif tail == "original":
                p = ours[layer]
                out[f"{head}weight"] = p.base if p.merged else value
            continue
        out[key] = value
    return out


def base_digest(net: nn.Module, exclude: Iterable[str] = ()) -> str:
    """Content hash of the teacher net's own weights (adapters excluded): what an adapter names as its base.
    `exclude`: parameters an adapter replaces whole (its train_also ones), which do not identify the base."""
    skip = set(exclude)
    return tensor_digest({k: v for k, v in base_state(net).items() if k not in skip})


# ------------------------------------------------------------------------------------------ detached adapters
@dataclass
class LayerFactors:
    kind: str  # linear | conv2d
    weight_shape: tuple
    factor_in: torch.Tensor  # (rank, fan_in)
    factor_out: torch.Tensor  # (out, rank)
    gain: float

    def delta(self) -> torch.Tensor:
        return (self.gain * (self.factor_out @ self.factor_in)).view(self.weight_shape)


@dataclass
class Adapter:
    """Adapters apart from any network: per-layer factors, whole parameters, and the base teacher's hash."""
    layers: dict[str, LayerFactors]
    whole: dict[str, torch.Tensor] = field(default_factory=dict)
    base_sha256: str | None = None
    info: dict = field(default_factory=dict)  # free-form description (method, steps, spec) kept in the file
    source: str = "adapter"  # how error lines name it: the file it was read from

    # ---- from and to a network
    @classmethod
    def extract(cls, net: nn.Module, train_also: Iterable[str] = (), info: Mapping | None = None) -> "Adapter":
        """A detached copy of net's adapters (and of its train_also parameters), naming net's base."""
        modules = dict(net.named_modules())
        layers = {name: LayerFactors(_kind(modules[name]), p.weight_shape, p.factor_in.detach().clone(),
                                     p.factor_out.detach().clone(), p.gain) for name, p in adapted(net).items()}
        if not layers:
            raise AdapterError("the network carries no adapters")
        whole = {n: _parameter(net, n).detach().clone() for n in whole_parameter_names(net, train_also)}
        return cls(layers, whole, base_digest(net, whole), dict(info or {}))

    def check_fits(self, net: nn.Module, source: str | None = None) -> None:
        """AdapterError naming the first layer (in the adapter's order) that net lacks or has in another shape."""
        source = source or self.source
        modules = dict(net.named_modules())
        for name, f in self.layers.items():
            m = modules.get(name)
            if m is None or not isinstance(m, tuple(KINDS)):
                raise AdapterError(f"{source}: layer '{name}' is not a Linear or Conv2d layer of this teacher; the "
                                   "adapter needs a teacher of the same architecture")
            shape = tuple(_parameter(net, f"{name}.weight").shape)
            if shape != tuple(f.weight_shape):
                raise AdapterError(f"{source}: layer '{name}' has weight shape {list(f.weight_shape)} in the adapter "
                                   f"but {list(shape)} in this teacher; the adapter needs a teacher of the same "
                                   "architecture")
        state = base_state(net)
        for name, t in self.whole.items():
            if name not in state or tuple(state[name].shape) != tuple(t.shape):
                have = list(state[name].shape) if name in state else "no such parameter"
                raise AdapterError(f"{source}: parameter '{name}' has shape {list(t.shape)} in the adapter but "
                                   f"{have} in this teacher")

    def apply(self, net: nn.Module, scale: float = 1.0, allow_other_base: bool = False, source: str | None = None,
              override_key: str = "allow_other_base") -> nn.Module:
        """Attach these adapters to net (in place; returns net) with every weight change multiplied by `scale`.
        Refused: layers net lacks or has in another shape (first one named), a net that already carries
        adapters, and -- unless allow_other_base -- a net whose weights are not the adapter's base teacher.
        Whole parameters are copied in unscaled (they replace, not add). Only the adapters train afterwards."""
        source = source or self.source
        if not (isinstance(scale, (int, float)) and math.isfinite(scale)):
            raise AdapterError(f"{source}: scale={scale!r} must be a finite number")
        self.check_fits(net, source)
        if adapted(net):
            raise AdapterError(f"{source}: this teacher already carries adapters; combine the adapters "
                               "(Adapter.combine) or merge the teacher's first")
        if not allow_other_base and self.base_sha256 is not None:
            have = base_digest(net, self.whole)
            if have != self.base_sha256:
                raise AdapterError(f"{source}: made for the base teacher with weights sha256 {self.base_sha256[:12]}, "
                                   f"this teacher's is {have[:12]}; set {override_key}=true to apply it anyway")
        modules = dict(net.named_modules())
        with torch.no_grad():
            for name, f in self.layers.items():
                p = _add(modules[name], name, f.factor_in.shape[0], f.gain * float(scale), None)
                p.factor_in.copy_(f.factor_in)
                p.factor_out.copy_(f.factor_out)
            for name, t in self.whole.items():
                _parameter(net, name).copy_(t)
        net.requires_grad_(False)
        for p in adapted(net).values():
            p.factor_in.requires_grad_(True)
            p.factor_out.requires_grad_(True)
        for name in self.whole:
            _parameter(net, name).requires_grad_(True)
        return net

    def deltas(self) -> dict[str, torch.Tensor]:
        """{layer: its weight change}, shaped like the weights."""
        return {name: f.delta() for name, f in self.layers.items()}

    @property
    def parameter_count(self) -> int:
        return sum(f.factor_in.numel() + f.factor_out.numel() for f in self.layers.values()) + \
            sum(t.numel() for t in self.whole.values())

    # ---- arithmetic
    def scaled(self, scale: float) -> "Adapter":
        layers = {n: LayerFactors(f.kind, f.weight_shape, f.factor_in, f.factor_out, f.gain * float(scale))
                  for n, f in self.layers.items()}
        return Adapter(layers, dict(self.whole), self.base_sha256, dict(self.info))

    @staticmethod
    def combine(a: "Adapter", b: "Adapter", scale_a: float = 1.0, scale_b: float = 1.0,
                allow_other_base: bool = False) -> "Adapter":
        """An adapter whose weight change is scale_a dW_a + scale_b dW_b on every layer either adapts (exactly
        representable: the factors are stacked, so the rank is the sum of both ranks on shared layers).
        Whole parameters may come from one adapter only. Refused when the two name different base teachers,
        unless allow_other_base (the result then names a's base)."""
        if not allow_other_base and a.base_sha256 and b.base_sha256 and a.base_sha256 != b.base_sha256:
            raise AdapterError(f"cannot combine adapters of different base teachers (sha256 {a.base_sha256[:12]} "
                               f"and {b.base_sha256[:12]}); pass allow_other_base=True to combine them anyway")
        layers: dict[str, LayerFactors] = {}
        for name in list(a.layers) + [n for n in b.layers if n not in a.layers]:
            parts = [(f, s) for f, s in ((a.layers.get(name), scale_a), (b.layers.get(name), scale_b)) if f is not None]
            shapes = {tuple(f.weight_shape) for f, _ in parts}
            if len(shapes) > 1:
                raise AdapterError(f"cannot combine: layer '{name}' has weight shapes {sorted(map(list, shapes))}")
            f0 = parts[0][0]
            # (g_a s_a) B_a A_a + (g_b s_b) B_b A_b = [g_a s_a B_a, g_b s_b B_b] @ [A_a; A_b], gain 1
            out = torch.cat([f.factor_out * (f.gain * float(s)) for f, s in parts], dim=1)
            inn = torch.cat([f.factor_in for f, _ in parts], dim=0)
            layers[name] = LayerFactors(f0.kind, f0.weight_shape, inn, out, 1.0)
        clash = set(a.whole) & set(b.whole)
        if clash:
            raise AdapterError(f"cannot combine: both adapters train parameter '{sorted(clash)[0]}' whole")
        info = {"combined": [{"scale": scale_a, "info": a.info}, {"scale": scale_b, "info": b.info}]}
        return Adapter(layers, {**a.whole, **b.whole}, a.base_sha256 or b.base_sha256, info)

    # ---- files
    def payload(self) -> tuple[dict[str, torch.Tensor], dict]:
        """(tensors, description): what a file holds. Tensor names: '<layer>.factor_in', '<layer>.factor_out',
        'whole.<parameter>'."""
        tensors = {}
        for name, f in self.layers.items():
            tensors[f"{name}.factor_in"], tensors[f"{name}.factor_out"] = f.factor_in, f.factor_out
        tensors.update({f"whole.{n}": t for n, t in self.whole.items()})
        desc = {"format": ADAPTER_FORMAT, "base_sha256": self.base_sha256,
                "layers": {n: {"kind": f.kind, "weight_shape": list(f.weight_shape), "rank": int(f.factor_in.shape[0]),
                               "gain": f.gain} for n, f in self.layers.items()},
                "whole": list(self.whole), "info": self.info}
        return tensors, json.loads(json.dumps(desc))

    @classmethod
    def from_payload(cls, tensors: Mapping[str, torch.Tensor], desc: Mapping, source: str = "adapter") -> "Adapter":
        """Inverse of payload, checking that the description and the tensors agree (one-line AdapterError)."""
        if not isinstance(desc, Mapping) or desc.get("format") != ADAPTER_FORMAT:
            raise AdapterError(f"{source}: not an adapter file (no {ADAPTER_FORMAT} description)")
        layers = {}
        try:
            for name, d in desc["layers"].items():
                shape, rank = tuple(int(s) for s in d["weight_shape"]), int(d["rank"])
                fi, fo = tensors[f"{name}.factor_in"], tensors[f"{name}.factor_out"]
                if tuple(fi.shape) != (rank, math.prod(shape[1:])) or tuple(fo.shape) != (shape[0], rank):
                    raise AdapterError(f"{source}: factors of layer '{name}' do not fit its weight shape {list(shape)} "
                                       f"at rank {rank}")
                gain = float(d["gain"])
                if not math.isfinite(gain):
                    raise AdapterError(f"{source}: layer '{name}' has a non-finite gain")
                layers[name] = LayerFactors(str(d["kind"]), shape, fi, fo, gain)
            whole = {n: tensors[f"whole.{n}"] for n in desc.get("whole", [])}
        except KeyError as e:
            raise AdapterError(f"{source}: tensor or field {e} is missing") from None
        except (TypeError, ValueError, AttributeError) as e:
            if isinstance(e, AdapterError):
                raise
            raise AdapterError(f"{source}: malformed adapter description ({e})") from None
        if not layers:
            raise AdapterError(f"{source}: holds no adapted layer")
        bad = [k for k, t in tensors.items() if t.is_floating_point() and not torch.isfinite(t).all()]
        if bad:
            raise AdapterError(f"{source}: tensor '{bad[0]}' holds NaN or inf values")
        return cls(layers, whole, desc.get("base_sha256"), dict(desc.get("info") or {}), source)

    def save(self, path) -> str:
        """One safetensors file: the factors, with the description as JSON in the header. Returns its sha256."""
        from .checkpoint import atomic_save_tensors

        tensors, desc = self.payload()
        return atomic_save_tensors(path, tensors, {HEADER_KEY: desc})

    @classmethod
    def read(cls, path) -> "Adapter":
        """An adapter file written by `save`; any fault is one AdapterError naming the file."""
        from .checkpoint import CheckpointError, _header_metadata, _read_bytes, _parse_tensors

        path = Path(path)
        try:
            data = _read_bytes(path, None)
            header = _header_metadata(data, path, None)
            tensors = _parse_tensors(data, path, None)
        except CheckpointError as e:
            raise AdapterError(str(e)) from None
        try:
            desc = json.loads(header.get(HEADER_KEY, "null"))
        except json.JSONDecodeError:
            desc = None
        return cls.from_payload(tensors, desc, str(path))


def file_size(path) -> int:
    return Path(path).stat().st_size


# ------------------------------------------------------------------------------------------ students
def core_network(student: nn.Module) -> nn.Module:
    """The teacher-shaped network inside a student (a NetDenoiser's `net`, also when a method wraps the
    denoiser, as consistency models do): where adapters sit and what their layer names are relative to."""
    from .denoiser import NetDenoiser

    for m in student.modules():
        if isinstance(m, NetDenoiser):
            return m.net
    raise AdapterError(f"a {type(student).__name__} student holds no NetDenoiser; adapters need one")


def spec_from(cfg_adapter) -> AdapterSpec:
    """AdapterSpec from the run config's `adapter` node."""
    return AdapterSpec(rank=cfg_adapter.rank, scale=cfg_adapter.scale, layers=list(cfg_adapter.layers),
                       skip=list(cfg_adapter.skip), train_also=list(cfg_adapter.train_also),
                       seed=int(cfg_adapter.seed))


def adapt_student(student: nn.Module, cfg_adapter, start: "Adapter | None" = None) -> nn.Module:
    """Give a freshly copied student trainable adapters, in place: a student copied from an adapter student keeps
    its adapters (stage k starts from stage k - 1's); one copied from the teacher gets new zero-initialised ones,
    or `start` (an adapter file's contents) when given. Everything else is frozen."""
    net = core_network(student)
    spec = spec_from(cfg_adapter)
    if not adapted(net):
        if start is not None:
            start.apply(net, allow_other_base=bool(cfg_adapter.allow_other_base), override_key="adapter.allow_other_base")
        else:
            attach(net, spec)
    student.requires_grad_(False)
    set_trainable(net, spec.train_also)
    return student


def frozen_teacher(module):
    """A stage teacher with adapters folded into plain weights (same outputs bit for bit, no per-call cost);
    anything else unchanged."""
    if isinstance(module, nn.Module) and any(isinstance(m, LowRankDelta) for m in module.modules()):
        return merged_copy(module)
    return module


def is_adapter_student(student: nn.Module) -> bool:
    try:
        return bool(adapted(core_network(student)))
    except AdapterError:
        return False


def student_payload(student: nn.Module, train_also: Iterable[str], info: Mapping | None = None):
    """(tensors, description) a stage saves for an adapter student: the adapter alone."""
    return Adapter.extract(core_network(student), train_also, info).payload()


def load_into_student(student: nn.Module, tensors: Mapping[str, torch.Tensor], desc: Mapping, source: str) -> None:
    """Put a saved stage adapter into a student built for that stage (whose core network carries adapters of the
    same layers and ranks, or none). The base teacher must match exactly (it is the run's own teacher)."""
    ad = Adapter.from_payload(tensors, desc, source)
    net = core_network(student)
    if not adapted(net):
        ad.apply(net, source=source, override_key="adapter.allow_other_base")
        return
    ours = adapted(net)
    if set(ours) != set(ad.layers) or any(ours[n].rank != f.factor_in.shape[0] for n, f in ad.layers.items()):
        raise AdapterError(f"{source}: its adapted layers or ranks differ from this run's adapter settings")
    have = base_digest(net, ad.whole)
    if ad.base_sha256 is not None and have != ad.base_sha256:
        raise AdapterError(f"{source}: made for the base teacher with weights sha256 {ad.base_sha256[:12]}, "
                           f"this run's teacher is {have[:12]}")
    with torch.no_grad():
        for name, f in ad.layers.items():
            ours[name].factor_in.copy_(f.factor_in)
            ours[name].factor_out.copy_(f.factor_out)
            ours[name].gain = f.gain
        for name, t in ad.whole.items():
            _parameter(net, name).copy_(t)
