"""Sweep configuration: a TOML file validated into typed, frozen objects.

Every error names the key (``[section] key``), shows the bad value and says how to fix it;
unknown keys are refused with the nearest valid key suggested. Units are fixed per key
(nm, meV, V, T) and values far outside a plausible range are refused as likely unit
mix-ups (nm vs um, meV vs eV) before any compute starts.

See ``configs/`` for commented examples.
"""

from __future__ import annotations

import difflib
import hashlib
import inspect
import math
import tomllib
import warnings
from pathlib import Path
from typing import Annotated, Any, Literal, Union

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from pipeline.device.templates import TEMPLATES
from pipeline.errors import ConfigError, ConfigWarning
from pipeline.physics.disorder import DISORDER_KINDS
from pipeline.physics.materials import BHZParameters, get_preset
from pipeline.transport.landauer import parse_measurement

__all__ = ['SweepConfig', 'load_config', 'parse_config', 'parse_stored_config', 'config_hash', 'AXES']

#: sweep axes in storage order (after "realisation"), with their units
AXES: dict[str, str] = {
    "geometry": "nm",
    "disorder_strength": "1",
    "b_perp": "T",
    "gate_voltage": "V",
    "energy": "meV",
}


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


#: ``[run] max_realisations`` when a precision target is set and it is not given
DEFAULT_MAX_REALISATIONS = 2000
#: smallest first block recommended with a precision target: an ensemble of 50 misses a
#: tail of weight 10 % entirely with probability 0.9^50 = 0.5 %; with 20, 12 % of such
#: points stopped after the first block and the coverage at the stop fell to 84 %
#: (benchmarks/precision_coverage.py, docs/precision.md)
RECOMMENDED_FIRST_BLOCK = 50


class RunSection(_Strict):
    #: run name (used in file names and provenance)
    name: str = Field(min_length=1, max_length=80, pattern=r"^[A-Za-z0-9_.\-]+$")
    #: root seed of every disorder realisation
    seed: int = Field(ge=0, lt=2**63)
    #: number of disorder realisations per sweep point
    realisations: int = Field(ge=1, le=10_000_000)
    #: run directory (holds samples.zarr, summaries, figures); relative to the working directory
    directory: str = "runs/{name}"
    #: stop adding realisations at a sweep point once the half-width of the 95 % interval of
    #: the mean of every measurement is at most this (each in the measurement's own unit);
    #: ``realisations`` is then the first block and the step (see :mod:`pipeline.precision`)
    target_ci: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    #: stop once the relative half-width of the L* interval, (high - low) / 2 / L*, is at most
    #: this at every (strength, field, gate, energy) point of a length sweep
    target_lstar_ci: float | None = Field(default=None, gt=0, lt=1, allow_inf_nan=False)
    #: most realisations per sweep point with a target (default 2000); refused without a target
    max_realisations: int | None = Field(default=None, ge=1, le=10_000_000)

    @model_validator(mode="after")
    def _targets(self):
        if self.max_realisations is not None and not self.has_target:
            raise ValueError(
                f"max_realisations = {self.max_realisations!r} bounds the realisations added to "
                f"reach a precision target, but no target is set; add target_ci (or "
                f"target_lstar_ci), or drop max_realisations and set realisations"
            )
        if self.has_target and self.realisation_limit < self.realisations:
            given = ("max_realisations = " f"{self.max_realisations!r}" if self.max_realisations
                     is not None else f"the default max_realisations = {DEFAULT_MAX_REALISATIONS}")
            raise ValueError(
                f"{given} is below realisations = {self.realisations!r} (the first block); "
                f"set max_realisations >= realisations"
            )
        if self.has_target and self.realisations < 2:
            raise ValueError(
                f"realisations = {self.realisations!r}: with a precision target it is the first "
                f"block, after which the interval is judged, and an interval needs at least 2 "
                f"samples; set realisations >= 2 (e.g. {RECOMMENDED_FIRST_BLOCK})"
            )
        if self.has_target and self.realisations < RECOMMENDED_FIRST_BLOCK:
            warnings.warn(
                f"[run] realisations = {self.realisations!r} is the first block of a precision "
                f"target: a point whose first {self.realisations} samples all miss a rare large "
                f"deviation looks precise and stops, so its interval holds the mean less often "
                f"than stated (measured in docs/precision.md); set realisations >= "
                f"{RECOMMENDED_FIRST_BLOCK}", ConfigWarning, stacklevel=2)
        return self

    @property
    def has_target(self) -> bool:
        """Whether a precision target (``target_ci`` or ``target_lstar_ci``) is set."""
        return self.target_ci is not None or self.target_lstar_ci is not None

    @property
    def realisation_limit(self) -> int:
        """Most realisations per point: ``max_realisations`` (default
        :data:`DEFAULT_MAX_REALISATIONS` with a target), else ``realisations``."""
        if not self.has_target:
            return self.realisations
        return self.max_realisations if self.max_realisations is not None else DEFAULT_MAX_REALISATIONS


class DeviceSection(_Strict):
    #: parametric template: "strip", "hbar" or "hallbar"
    template: str | None = None
    #: a geometry file (.geojson, .json, .wkt, .gds); relative paths are taken from the config file
    file: str | None = None
    #: template parameters in nm
    parameters: dict[str, float] = {}
    #: GDSII layer map, e.g. {mesa = [1, 0], contact = [2, 0], gate = [3, 0]}
    layer_map: dict[str, tuple[int, int]] | None = None

    @model_validator(mode="after")
    def _one_source(self):
        if (self.template is None) == (self.file is None):
            raise ValueError(
                "give exactly one of 'template' (strip, hbar, hallbar) or 'file' (a geometry file)"
            )
        for key, value in self.parameters.items():
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"template parameter {key!r} must be a positive length in nm, got {value!r}")
            if value > 1e6:
                raise ValueError(
                    f"template parameter {key!r} = {value!r} nm is over 1 mm: lengths are in nm "
                    f"(did you give um or A?)"
                )
        return self


class LatticeSection(_Strict):
    #: square-lattice constant a in nm
    constant: float

    @field_validator("constant")
    @classmethod
    def _plausible(cls, v: float) -> float:
        if not (math.isfinite(v) and v > 0):
            raise ValueError(f"must be a positive length in nm, got {v!r}")
        if v < 0.1:
            raise ValueError(f"{v!r} nm is below 0.1 nm: the lattice constant is in nm (did you give um?)")
        if v > 100:
            raise ValueError(f"{v!r} nm is too coarse for the BHZ model (edge states are tens of nm wide); use 1-10 nm")
        return v


class MaterialSection(_Strict):
    #: named preset (see pipeline.physics.materials.PRESETS)
    preset: str | None = None
    A: float | None = None
    B: float | None = None
    C: float | None = None
    D: float | None = None
    M: float | None = None
    delta_bia: float | None = None
    g_E: float | None = None
    g_H: float | None = None

    @model_validator(mode="after")
    def _complete(self):
        explicit = [k for k in "ABCDM" if getattr(self, k) is None]
        if self.preset is None and explicit:
            raise ValueError(
                f"give a 'preset' or all of A, B, C, D, M (missing: {', '.join(explicit)})"
            )
        for key in ("M", "C", "delta_bia"):
            v = getattr(self, key)
            if v is not None and abs(v) > 2000:
                raise ValueError(f"{key} = {v!r} meV is implausibly large: energies are in meV (did you give ueV?)")
        return self

    def parameters(self):

        base = get_preset(self.preset) if self.preset else None
        changes = {k: getattr(self, k) for k in ("A", "B", "C", "D", "M", "delta_bia", "g_E", "g_H")
                   if getattr(self, k) is not None}
        if base is None:
            return BHZParameters(**changes, name="explicit parameters", source="configuration file")
        if changes:
            return base.with_(**changes, name=f"{base.name} (modified: {', '.join(changes)})")
        return base


class ContactSection(_Strict):
    #: downward band shift in the leads (meV): 0 = device material, tens of meV = metallic contact;
    #: one number for all contacts or a table by contact name
    doping: float | dict[str, float] = 0.0

    @field_validator("doping")
    @classmethod
    def _range(cls, v):
        values = v.values() if isinstance(v, dict) else [v]
        for x in values:
            if not math.isfinite(x) or abs(x) > 2000:
                raise ValueError(f"contact doping {x!r} meV is outside [-2000, 2000] meV (energies are in meV)")
        return v


class GateSection(_Strict):
    #: potential energy per gate volt on the gated sites (meV/V); U = -lever_arm * V_gate
    lever_arm: float = 0.0
    #: gates driven by the gate_voltage axis (default: all gates of the device)
    driven: list[str] | None = None


#: one ``[[disorder]]`` table: any kind of the registry, chosen by its ``kind`` key
DisorderTerm = Annotated[
    Union[tuple(k.spec for k in DISORDER_KINDS.values())], Field(discriminator="kind")
]


def _axis_values(value: Any, name: str, unit: str) -> list[float]:
    if isinstance(value, (int, float)):
        return [float(value)]
    if isinstance(value, list):
        out = [float(x) for x in value]
    elif isinstance(value, dict):
        extra = set(value) - {"start", "stop", "num", "step"}
        if extra or "start" not in value or "stop" not in value or ("num" in value) == ("step" in value):
            raise ValueError(
                f"a range needs start, stop and exactly one of num or step "
                f"(e.g. {{start = -5, stop = 5, num = 11}}), got {value!r}"
            )
        start, stop = float(value["start"]), float(value["stop"])
        if "num" in value:
            num = int(value["num"])
            if num < 1:
                raise ValueError(f"num must be at least 1, got {num!r}")
            out = np.linspace(start, stop, num).tolist()
        else:
            step = float(value["step"])
            if step <= 0 or (stop - start) / step > 1e6:
                raise ValueError(f"step must be positive and give at most 1e6 points, got {step!r}")
            out = np.arange(start, stop + 0.5 * step, step).round(12).tolist()
    else:
        raise ValueError(f"expected a number, a list or a range table, got {value!r}")
    if not out:
        raise ValueError("the axis is empty; give at least one value")
    if any(not math.isfinite(x) for x in out):
        raise ValueError(f"values must be finite, got {out!r}")
    if len(set(out)) != len(out):
        raise ValueError(f"values repeat: {out!r}; give each value once")
    return out


class GeometryAxis(_Strict):
    #: template parameter to vary (nm)
    parameter: str
    values: Any

    @field_validator("values")
    @classmethod
    def _vals(cls, v):
        vals = _axis_values(v, "geometry", "nm")
        if any(x <= 0 for x in vals):
            raise ValueError(f"geometry values are lengths in nm and must be positive, got {vals!r}")
        return vals


class SweepSection(_Strict):
    model_config = ConfigDict(extra="forbid", frozen=True, validate_default=True)

    energy: Any = 0.0
    gate_voltage: Any = 0.0
    b_perp: Any = 0.0
    disorder_strength: Any = 1.0
    geometry: GeometryAxis | None = None

    @field_validator("energy", "gate_voltage", "b_perp", "disorder_strength")
    @classmethod
    def _vals(cls, v, info):
        vals = _axis_values(v, info.field_name, AXES[info.field_name])
        limits = {"energy": (500, "meV (did you give eV or ueV?)"),
                  "gate_voltage": (1000, "V"), "b_perp": (100, "T"),
                  "disorder_strength": (1e3, "(a dimensionless multiplier)")}
        lim, unit = limits[info.field_name]
        bad = [x for x in vals if abs(x) > lim]
        if bad:
            raise ValueError(f"{bad[0]!r} is outside +-{lim:g} {unit}")
        if info.field_name == "disorder_strength" and any(x < 0 for x in vals):
            raise ValueError(f"disorder strengths are non-negative multipliers, got {vals!r}")
        return vals


class MeasureSection(_Strict):
    #: named measurements: "R14,23", "G14", "R(src,drn;vp,vm)", "G(src,drn)"
    labels: list[str] = Field(min_length=1)

    @model_validator(mode="before")
    @classmethod
    def _old_key(cls, data):
        # the key was called "report" until the command of that name made it ambiguous
        if isinstance(data, dict) and "report" in data and "labels" not in data:
            warnings.warn("'[measure] report' is deprecated: rename the key to 'labels' "
                          "(same list of measurements)", ConfigWarning, stacklevel=2)
            data = {("labels" if k == "report" else k): v for k, v in data.items()}
        return data

    @field_validator("labels")
    @classmethod
    def _parse(cls, v):
        for label in v:
            parse_measurement(label)  # raises with the accepted forms
        if len(set(v)) != len(v):
            raise ValueError(f"measurements repeat: {v!r}")
        return v


class ExecutionSection(_Strict):
    #: worker processes (0: one per core)
    workers: int = Field(default=0, ge=0, le=4096)
    #: samples per task at least (0: 8); a task is a block of realisations at one geometry
    #: and strength, all (field, gate, energy) points; fixed when the store is created
    batch: int = Field(default=0, ge=0, le=100_000)
    #: reuse lead modes across realisations (Kwant precalculate)
    precalculate_leads: bool = True
    #: solve the two spin blocks separately when S_z is conserved ("auto") or never ("off")
    spin_blocks: Literal["auto", "off"] = "auto"


class ClusterSection(_Strict):
    """Where to run: a local cluster (default) or Slurm through dask-jobqueue.

    Unset keys fall back to the site defaults file and then to built-in defaults (resolved in
    one place, :func:`pipeline.sweep.clusters.resolve_cluster_settings`).
    """

    #: "local" or "slurm"
    kind: Literal["local", "slurm"] = "local"
    partition: str | None = None
    account: str | None = None
    #: job walltime "HH:MM:SS" (or "D-HH:MM:SS")
    walltime: str | None = Field(default=None, pattern=r"^(\d+-)?\d{1,3}:\d{2}:\d{2}$")
    #: memory per job, e.g. "4GB"
    memory: str | None = Field(default=None, pattern=r"^\d+(\.\d+)?\s*(KB|MB|GB|TB|KiB|MiB|GiB|TiB)$")
    #: cores (= single-threaded worker processes) per job
    cores: int | None = Field(default=None, ge=1, le=1024)
    #: fixed number of jobs (omit for adaptive scaling)
    jobs: int | None = Field(default=None, ge=1, le=10000)
    adaptive_minimum: int | None = Field(default=None, ge=0)
    adaptive_maximum: int | None = Field(default=None, ge=1)
    #: extra "#SBATCH" directives, e.g. ["--qos=long", "--constraint=avx2"]
    extra_directives: list[str] = []
    #: network interface for the scheduler and workers, e.g. "ib0" or "lo"
    interface: str | None = None
    #: shared directory for logs, scheduler file and job scripts (visible to all nodes)
    shared_directory: str | None = None
    #: seconds without any worker (while tasks wait) before the run stops with an error
    worker_timeout: float | None = Field(default=None, gt=0)
    #: where the Dask dashboard listens, "host:port"; default "127.0.0.1:0" (this node only)
    dashboard_address: str | None = None
    #: site defaults file (TOML with a [cluster] table); default ~/.config/helisweep/site.toml
    site_defaults: str | None = None


class ConcatenationSection(_Strict):
    """Edges beyond direct reach, composed from independent disordered segments
    (see :mod:`pipeline.longedges`); a two-terminal strip only."""

    #: length of one segment (nm), a multiple of the lattice constant
    segment_length: float = Field(gt=0, le=1e5)
    #: segments in the pool per (energy, field, disorder strength) point
    segments: int = Field(default=200, ge=2, le=100_000)
    #: clean buffer at each segment end (nm), or "auto" (from the evanescent decay length)
    buffer: float | Literal["auto"] = "auto"
    #: edge lengths (nm), multiples of segment_length
    lengths: list[float] = Field(min_length=1)
    #: random segment sequences (edges) per length
    sequences: int = Field(default=1000, ge=2, le=10_000_000)
    #: "coherent" (star product of amplitudes), "incoherent" (of probabilities), or both
    modes: list[Literal["coherent", "incoherent"]] = ["coherent", "incoherent"]
    #: bootstrap resamples of the pool for the error of the mean (0: plain standard error)
    pool_resamples: int = Field(default=200, ge=0, le=100_000)


class EdgesSection(_Strict):
    """The helical-edge network model of a multi-terminal device (see :mod:`pipeline.network`):
    edge sections composed from pools of disordered segments, contacts as reservoirs."""

    #: length of one pool segment (nm) including its clean buffers, a multiple of the lattice constant
    segment_length: float = Field(gt=0, le=1e5)
    #: segments per pool; one pool per (edge energy, field, disorder strength)
    segments: int = Field(default=200, ge=2, le=100_000)
    #: sampled devices per sweep point (the realisations of the network model)
    sequences: int = Field(default=1000, ge=2, le=10_000_000)
    #: clean buffer at each segment end (nm), or "auto" (from the evanescent decay length)
    buffer: float | Literal["auto"] = "auto"
    #: width of the pool strip (nm), or "auto" (5 edge decay lengths); the device's own widths
    #: enter only through the guard rails
    width: float | Literal["auto"] = "auto"
    #: "coherent" (phase kept along a section) or "incoherent" (full dephasing between segments)
    composition: Literal["coherent", "incoherent"] = "coherent"
    #: bootstrap resamples of the pools for the standard error of the mean (0: skip)
    pool_resamples: int = Field(default=50, ge=0, le=100_000)
    #: bound on exp(-2 b / l_ev), the evanescent coupling across a segment junction
    evanescent_tolerance: float = Field(default=1e-6, gt=0, lt=1)


class SummarySection(_Strict):
    """How the realisations are reduced to statistics (does not change any sample)."""

    #: a sample counts in the tail fraction when it is more than this relative deviation off
    #: the ideal (quantised) value, e.g. 0.05: G < 1.9 e^2/h for an ideal 2 e^2/h
    tail_deviation: float = Field(default=0.05, gt=0, lt=1)


class SweepConfig(_Strict):
    run: RunSection
    device: DeviceSection
    lattice: LatticeSection
    material: MaterialSection
    contacts: ContactSection = ContactSection()
    gates: GateSection = GateSection()
    disorder: list[DisorderTerm] = []
    sweep: SweepSection = SweepSection()
    measure: MeasureSection
    execution: ExecutionSection = ExecutionSection()
    cluster: ClusterSection = ClusterSection()
    concatenation: ConcatenationSection | None = None
    edges: EdgesSection | None = None
    summary: SummarySection = SummarySection()
    #: directory of the config file (resolves relative geometry paths); not part of the file
    base_dir: str = Field(default=".", exclude=True)
    #: the exact text the config was read from
    source_text: str = Field(default="", exclude=True)

    @property
    def axes(self) -> dict[str, list[float]]:
        """Sweep axes in storage order; a geometry axis of one nominal value when not swept."""
        geo = self.sweep.geometry.values if self.sweep.geometry else [0.0]
        return {
            "geometry": list(geo),
            "disorder_strength": list(self.sweep.disorder_strength),
            "b_perp": list(self.sweep.b_perp),
            "gate_voltage": list(self.sweep.gate_voltage),
            "energy": list(self.sweep.energy),
        }

    @property
    def run_dir(self) -> Path:
        return Path(self.run.directory.format(name=self.run.name))

    @property
    def needs_field(self) -> bool:
        return any(b != 0 for b in self.sweep.b_perp)


def _nearest_key(loc: tuple, model_fields: list[str]) -> str:
    near = difflib.get_close_matches(str(loc[-1]), model_fields, n=1, cutoff=0.5)
    return f" Did you mean {near[0]!r}?" if near else f" Valid keys here: {', '.join(model_fields)}."


def _fields_at(loc: tuple) -> list[str]:
    """Field names of the model at a location (for suggestions)."""
    model: Any = SweepConfig
    for part in loc[:-1]:
        if isinstance(part, int):
            continue
        fields = getattr(model, "model_fields", {})
        if part in fields:
            ann = fields[part].annotation
            model = ann if isinstance(ann, type) and issubclass(ann, BaseModel) else None
            if model is None:
                # disorder terms: suggest across all term kinds
                return sorted({f for k in DISORDER_KINDS.values() for f in k.spec.model_fields})
        elif part in DISORDER_KINDS:
            model = DISORDER_KINDS[part].spec
    return list(getattr(model, "model_fields", {}))


def _where(loc: tuple) -> str:
    parts = [p for p in loc if p not in DISORDER_KINDS]
    if not parts:
        return "top level"
    keys = []
    for p in parts:
        keys.append(f"[{p}]" if isinstance(p, int) else str(p))
    return ".".join(keys).replace(".[", "[")


def _translate(err: ValidationError, source: str) -> ConfigError:
    lines = []
    for e in err.errors():
        loc = tuple(e["loc"])
        where = _where(loc)
        if e["type"] == "extra_forbidden":
            lines.append(f"{source}: unknown key '{where}'.{_nearest_key(loc, _fields_at(loc))}")
        elif e["type"] == "missing":
            lines.append(f"{source}: missing key '{where}': add it (see configs/ for examples)")
        else:
            msg = e["msg"].removeprefix("Value error, ")
            lines.append(f"{source}: '{where}' = {e.get('input')!r}: {msg}")
    return ConfigError("invalid configuration:\n  " + "\n  ".join(lines))


def parse_config(text: str, *, source: str = "<config>", base_dir: str | Path = ".") -> SweepConfig:
    """Validate TOML text into a :class:`SweepConfig` (raises :class:`ConfigError`)."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: not valid TOML: {exc}") from None
    data = dict(data)
    try:
        cfg = SweepConfig.model_validate(data | {"base_dir": str(base_dir), "source_text": text})
    except ValidationError as exc:
        raise _translate(exc, source) from None
    _check_cross(cfg, source)
    return cfg


def parse_stored_config(text: str, *, source: str, base_dir: str | Path = ".") -> SweepConfig:
    """Validate the config text a store recorded; deprecated spellings pass silently there
    (the text is a record of a past run, not the file the user is editing)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConfigWarning)
        return parse_config(text, source=source, base_dir=base_dir)


def load_config(path: str | Path) -> SweepConfig:
    """Read and validate a sweep configuration file."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"configuration file {str(path)!r} does not exist; see configs/ for examples")
    return parse_config(path.read_text(), source=str(path), base_dir=path.parent)


def _check_cross(cfg: SweepConfig, source: str) -> None:
    """Checks that span sections: the device source, lengths against the lattice, the gate
    lever arm, the concatenation table and the material."""
    _check_device_source(cfg, source)
    _check_lengths_and_gates(cfg, source)
    _check_concatenation(cfg, source)
    _check_edges(cfg, source)
    cfg.material.parameters()  # validates the BHZ set (raises ModelError with the fix)


def _check_device_source(cfg: SweepConfig, source: str) -> None:
    """A template exists and gets exactly its parameters; a file device has no geometry axis."""
    dev = cfg.device
    if dev.template is not None:
        if dev.template not in TEMPLATES:
            near = difflib.get_close_matches(dev.template, TEMPLATES, n=1)
            hint = f" Did you mean {near[0]!r}?" if near else ""
            raise ConfigError(
                f"{source}: 'device.template' = {dev.template!r} is not a template.{hint} "
                f"Templates: {', '.join(TEMPLATES)}"
            )
        sig = inspect.signature(TEMPLATES[dev.template])
        allowed = [p for p in sig.parameters if p != "name"]
        for key in dev.parameters:
            if key not in allowed:
                near = difflib.get_close_matches(key, allowed, n=1)
                hint = f" Did you mean {near[0]!r}?" if near else ""
                raise ConfigError(
                    f"{source}: unknown parameter 'device.parameters.{key}' of template "
                    f"{dev.template!r}.{hint} Parameters: {', '.join(allowed)}"
                )
        if cfg.sweep.geometry and cfg.sweep.geometry.parameter not in allowed:
            near = difflib.get_close_matches(cfg.sweep.geometry.parameter, allowed, n=1)
            hint = f" Did you mean {near[0]!r}?" if near else ""
            raise ConfigError(
                f"{source}: 'sweep.geometry.parameter' = {cfg.sweep.geometry.parameter!r} is not a "
                f"parameter of template {dev.template!r}.{hint} Parameters: {', '.join(allowed)}"
            )
        missing = [p for p in allowed if p not in dev.parameters
                   and sig.parameters[p].default is inspect.Parameter.empty
                   and not (cfg.sweep.geometry and cfg.sweep.geometry.parameter == p)]
        if missing:
            raise ConfigError(
                f"{source}: template {dev.template!r} needs 'device.parameters' "
                f"{', '.join(missing)} (nm)"
            )
    elif cfg.sweep.geometry is not None:
        raise ConfigError(
            f"{source}: 'sweep.geometry' varies a template parameter, but the device is a file "
            f"({dev.file!r}); use a template or drop the geometry axis"
        )


def _check_lengths_and_gates(cfg: SweepConfig, source: str) -> None:
    """Lengths of at least two lattice constants, an existing device file, a lever arm when
    the gate is swept."""
    dev = cfg.device
    a = cfg.lattice.constant
    lengths = [(f"device.parameters.{k}", v) for k, v in dev.parameters.items()]
    if cfg.sweep.geometry is not None:
        lengths += [("sweep.geometry.values", v) for v in cfg.sweep.geometry.values]
    for key, value in lengths:
        if value < 2 * a:
            raise ConfigError(
                f"{source}: '{key}' = {value!r} nm is smaller than two lattice constants "
                f"({2 * a:g} nm): lengths are in nm (did you give um or m?)"
            )
    if dev.file is not None and not (Path(cfg.base_dir) / dev.file).is_file():
        raise ConfigError(
            f"{source}: 'device.file' = {dev.file!r} does not exist (looked in "
            f"{str(Path(cfg.base_dir) / dev.file)!r}); paths are relative to the config file"
        )
    if any(v != 0 for v in cfg.sweep.gate_voltage) and cfg.gates.lever_arm == 0:
        raise ConfigError(
            f"{source}: 'sweep.gate_voltage' is swept but 'gates.lever_arm' is 0 meV/V, so the "
            f"gate would do nothing; set the lever arm (meV per volt)"
        )


def _check_concatenation(cfg: SweepConfig, source: str) -> None:
    """A ``[concatenation]`` table composes segments of a two-terminal strip."""
    dev, a = cfg.device, cfg.lattice.constant
    cc = cfg.concatenation
    if cc is not None:
        if dev.template != "strip":
            raise ConfigError(
                f"{source}: [concatenation] composes segments of a two-terminal strip, but "
                f"'device' is {dev.template or dev.file!r}; use template = \"strip\""
            )
        ratio = cc.segment_length / a
        if abs(ratio - round(ratio)) > 1e-9:
            raise ConfigError(
                f"{source}: 'concatenation.segment_length' = {cc.segment_length!r} nm is not a "
                f"multiple of the lattice constant {a:g} nm"
            )
        for L in cc.lengths:
            n = L / cc.segment_length
            if n < 1 - 1e-9 or abs(n - round(n)) > 1e-9:
                raise ConfigError(
                    f"{source}: 'concatenation.lengths' contains {L!r} nm, which is not a "
                    f"multiple of segment_length = {cc.segment_length!r} nm"
                )
        if len(set(cc.modes)) != len(cc.modes) or not cc.modes:
            raise ConfigError(f"{source}: 'concatenation.modes' = {cc.modes!r}: give each mode once")
        if any(g != 0 for g in cfg.sweep.gate_voltage):
            raise ConfigError(f"{source}: [concatenation] does not support a gate sweep (the strip has no gates)")


def _check_edges(cfg: SweepConfig, source: str) -> None:
    """An ``[edges]`` table: lengths on the lattice (the device itself is checked by the
    network's guard rails before compute)."""
    ec = cfg.edges
    if ec is None:
        return
    a = cfg.lattice.constant
    for key, value in (("segment_length", ec.segment_length), ("buffer", ec.buffer),
                       ("width", ec.width)):
        if value == "auto":
            continue
        ratio = float(value) / a
        if ratio < 1 - 1e-9 and not (key == "buffer" and value == 0):
            raise ConfigError(f"{source}: 'edges.{key}' = {value!r} nm is below the lattice "
                              f"constant {a:g} nm (lengths are in nm)")
        if abs(ratio - round(ratio)) > 1e-9:
            raise ConfigError(
                f"{source}: 'edges.{key}' = {value!r} nm is not a multiple of the lattice "
                f"constant {a:g} nm; use {round(ratio) * a:g}"
            )


def config_hash(cfg: SweepConfig) -> str:
    """SHA-256 of everything that determines the numbers in the sample store.

    The run name, directory, number of realisations, the precision targets (``target_ci``,
    ``target_lstar_ci``, ``max_realisations``: they choose how many realisations, not what
    a realisation is), execution and cluster settings are excluded:
    they do not change a single sample (realisation r is the same sample whatever the total),
    so a run may be renamed, extended with more realisations or rerun with more workers and
    still resume.
    """
    data = cfg.model_dump(mode="json",
                          exclude={"execution": True, "cluster": True, "concatenation": True,
                                   "edges": True, "summary": True, "run": {"name", "directory", "realisations", "target_ci",
                                                  "target_lstar_ci", "max_realisations"}})
    # the hash predates the rename of "[measure] report" to "labels"; hashing the old name
    # keeps every existing store resumable
    data["measure"] = {"report": data["measure"].pop("labels"), **data["measure"]}
    text = repr(sorted(_flatten(data)))
    return hashlib.sha256(text.encode()).hexdigest()


def _flatten(d: Any, prefix: str = ""):
    if isinstance(d, dict):
        for k, v in d.items():
            yield from _flatten(v, f"{prefix}.{k}" if prefix else str(k))
    elif isinstance(d, list):
        for i, v in enumerate(d):
            yield from _flatten(v, f"{prefix}[{i}]")
    else:
        yield (prefix, repr(d))
