"""The generated methods paragraph of a run: how its numbers were computed, from its own inputs.

:func:`methods_text` writes one paragraph to paste into a paper -- model and material, device,
contacts and gates, disorder (the sentence of the registry,
:func:`pipeline.physics.disorder.describe`), sweep, sample counts, transport and statistics --
and a short list of the inputs. Every number in it comes from the configuration, the store
and the summary. :func:`store_facts` reads what the text needs from the store.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.analysis.lstar_fits import POWER, SIGNIFICANCE
from pipeline.analysis.statistics import IntervalFlag
from pipeline.physics.disorder import describe
from pipeline.sweep.config import SweepConfig
from pipeline.sweep.runmodel import device_for, disorder_terms
from pipeline.sweep.store import SampleStore
from pipeline.transport.landauer import parse_measurement

__all__ = ['methods_text', 'store_facts']

_TEMPLATE_NAMES = {"strip": "two-terminal strip", "hbar": "four-terminal H-bar",
                   "hallbar": "six-terminal Hall bar"}
_SOLVER_NAMES = {"mumps": "the MUMPS sparse direct solver", "scipy": "SciPy's sparse solver"}

#: a parenthesised file path, as older provenance wrote after the BLAS name
_PATH_IN_PARENS = re.compile(r"\s*\(/[^)]*\)")


def _blas_phrase(session: Mapping) -> str:
    """The BLAS under the solver as the session recorded it, with no machine path.

    Sessions record ``blas`` (no paths); older ones only ``system_blas``, which could hold the
    library's path in parentheses: that part is dropped.
    """
    text = str(session.get("blas") or session.get("system_blas") or "unknown")
    text = _PATH_IN_PARENS.sub("", text)
    return " ".join(w for w in text.split() if not w.startswith("/")) or "unknown"


def _g(x: float) -> str:
    return f"{float(x):g}"


def store_facts(store_path: Path) -> dict:
    """What the package and the methods text read from a sample store.

    Parameters
    ----------
    store_path : Path
        The sample store.

    Returns
    -------
    dict
        ``attrs`` (the store's attributes: run name, config text and hash, sessions,
        failures), ``counts`` (samples done, failed, missing, total) and
        ``realisations_in_store``.
    """
    store = SampleStore.open(store_path)
    attrs = dict(store.group.attrs)
    return {"attrs": attrs, "counts": store.counts(),
            "realisations_in_store": int(store.shape[0])}


# --------------------------------------------------------------------------- phrases
def _axis_text(values: Sequence[float], unit: str) -> str:
    u = "" if unit == "1" else f" {unit}"
    vals = [float(v) for v in values]
    if len(vals) == 1:
        return f"fixed at {_g(vals[0])}{u}"
    if len(vals) <= 6:
        return f"{', '.join(_g(v) for v in vals[:-1])} and {_g(vals[-1])}{u}"
    steps = np.diff(vals)
    text = f"{len(vals)} values from {_g(vals[0])} to {_g(vals[-1])}{u}"
    if np.allclose(steps, steps[0], rtol=1e-6, atol=1e-12):
        text += f" in steps of {_g(steps[0])}{u}"
    return text


def _bootstrap_text(attrs: Mapping) -> str:
    """What the confidence intervals of the summary are (from its attributes)."""
    try:
        level = float(attrs.get("confidence", 0.95))
    except (TypeError, ValueError):
        level = 0.95
    resamples = attrs.get("bootstrap_resamples")
    seed = attrs.get("bootstrap_seed")
    if resamples is not None and int(resamples) == 0:
        return "not computed (no bootstrap resamples); the standard error of the mean is given"
    if "studentized" not in str(attrs.get("bootstrap_method", "")):  # a summary of an older version
        text = (f"{level * 100:g} % percentile-bootstrap confidence intervals of the mean over "
                f"realisations")
    else:
        text = (f"{level * 100:g} % studentized-bootstrap confidence intervals of the mean over "
                f"realisations (bootstrap-t: each resample's mean is standardised by its own "
                f"standard error s*/sqrt(N), and the interval is the sample mean minus the upper "
                f"and lower quantiles of that ratio times s/sqrt(N); the tail levels are widened "
                f"for small N to Phi(-sqrt(N/(N-1)) t_(N-1)), after Hesterberg (2015); where the "
                f"samples are all equal the interval has zero width and is flagged)")
    details = []
    if resamples is not None:
        details.append(f"{int(resamples)} resamples")
    if seed is not None:
        details.append(f"seed {seed}")
    return text + (f" ({', '.join(details)})" if details else "")


def _quality_text(summary: Any) -> str:
    """Flagged points and the tail fraction, as far as the summary has them."""
    attrs = summary.attrs
    parts = []
    if "ci_flag" in summary:
        flags = np.asarray(summary["ci_flag"].values)
        sparse = int((flags == IntervalFlag.SPARSE_TAIL).sum())
        parts.append(
            " The coverage of these intervals was measured on synthetic ensembles with known "
            "means (docs/statistics.md of helisweep): at 16 or more realisations they hold at "
            "least 93 % for samples bounded by a quantised value and for log-normal samples. "
            "Points whose samples show rare large deviations (a small cluster beyond a gap, "
            "fewer than a quarter of the samples) cannot be given an interval that holds its "
            "level; they are flagged (ci_flag = sparse_tail, ringed in the figures) with the "
            "number of realisations at which an ensemble misses such a tail with probability "
            f"below {(1 - float(attrs.get('confidence', 0.95))) / 2:.3g}"
            + (f"; {sparse} point(s) of this summary are flagged" if sparse else
               "; no point of this summary is flagged") + ".")
    dev = attrs.get("tail_deviation")
    if dev is not None and "tail_fraction" in summary:
        parts.append(f" For every point the fraction of samples more than {float(dev) * 100:g} % "
                     f"off the ideal value is given (tail_fraction) with a Wilson score "
                     f"interval.")
    return "".join(parts)


def _thermal_text(attrs: Mapping) -> str:
    temps = attrs.get("temperatures_K", [])
    if isinstance(temps, str):
        try:
            temps = json.loads(temps)
        except ValueError:
            temps = []
    temps = [float(t) for t in np.atleast_1d(temps)] if len(np.atleast_1d(temps)) else []
    if not temps:
        return ""
    return (" Finite-temperature values were obtained by smearing each sample's transmission "
            "matrix over the energy grid with the derivative of the Fermi function, -df/dE, at "
            f"T = {', '.join(_g(t) for t in temps)} K, and recomputing the measurements from "
            "the smeared matrices.")


def _doping_text(doping: Any) -> str:
    if isinstance(doping, Mapping):
        parts = ", ".join(f"{k}: {_g(v)} meV" for k, v in doping.items())
        return (f"Each contact is a semi-infinite lead of the contact's width made of the well "
                f"material with its bands shifted down by a per-contact doping ({parts}; "
                f"unlisted contacts 0 meV)")
    if float(doping) == 0:
        return ("Each contact is a semi-infinite lead of the contact's width made of the "
                "quantum-well material itself (undoped leads)")
    return (f"Each contact is a semi-infinite lead of the contact's width made of the well "
            f"material with its bands shifted down by {_g(doping)} meV, so that the leads are "
            f"metallic (a model of ohmic contacts)")


# --------------------------------------------------------------------------- sections
def _material_section(cfg: SweepConfig) -> str:
    """Model, material parameters and discretisation."""
    p = cfg.material.parameters()
    text = (
        f"Transport was computed in the four-band Bernevig-Hughes-Zhang (BHZ) model of a "
        f"quantum spin Hall insulator ({p.name}) with A = {_g(p.A)} meV nm, "
        f"B = {_g(p.B)} meV nm^2, C = {_g(p.C)} meV, D = {_g(p.D)} meV nm^2 and "
        f"M = {_g(p.M)} meV (source: {p.source})"
    )
    extras = []
    if p.delta_bia:
        extras.append(f"a bulk-inversion-asymmetry coupling Delta = {_g(p.delta_bia)} meV "
                      f"between opposite spins")
    if p.g_E or p.g_H:
        field_note = ("" if cfg.needs_field
                      else "; they play no role here since the field is zero throughout")
        extras.append(f"effective g-factors g_E = {_g(p.g_E)} and g_H = {_g(p.g_H)} for the "
                      f"Zeeman energy in a perpendicular field{field_note}")
    if extras:
        text += ", with " + " and ".join(extras)
    return text + (f". The model is discretised by finite differences on a square lattice with "
                   f"lattice constant a = {_g(cfg.lattice.constant)} nm; a perpendicular "
                   f"magnetic field enters through Peierls phases and the Zeeman term.")


def _device_section(cfg: SweepConfig) -> str:
    """The device: a geometry file or a template with its (swept) parameters."""
    dev = cfg.device
    if dev.file is not None:
        device = device_for(cfg, 0)
        return (f"The device outline was read from the geometry file {Path(dev.file).name} "
                f"(contacts {', '.join(device.contact_names)}"
                + (f"; gates {', '.join(device.gate_names)}" if device.gate_names else "")
                + ").")
    params = dict(dev.parameters)
    geo = cfg.sweep.geometry
    fixed = ", ".join(f"{k} = {_g(v)} nm" for k, v in params.items())
    text = (f"The device is a {_TEMPLATE_NAMES.get(dev.template, dev.template)} "
            f"(template '{dev.template}') with {fixed or 'default parameters'}")
    if geo is not None:
        text += f"; its {geo.parameter} was swept over {_axis_text(geo.values, 'nm')}"
    return text + "."


def _contacts_and_gates_section(cfg: SweepConfig) -> str:
    """The leads (their doping) and, when gates act, how the gate voltage enters."""
    text = _doping_text(cfg.contacts.doping) + "."
    if any(v != 0 for v in cfg.axes["gate_voltage"]) or cfg.gates.lever_arm:
        driven = cfg.gates.driven
        text += (f" A gate voltage V_g shifts the potential energy of the sites under "
                 f"{'the gates ' + ', '.join(driven) if driven else 'all gates'} by "
                 f"U = -alpha V_g with lever arm alpha = {_g(cfg.gates.lever_arm)} meV/V.")
    return text


def _disorder_section(cfg: SweepConfig) -> str:
    """The disorder terms (the registry's own sentence), scaling and seeding."""
    return describe(disorder_terms(cfg)) + (
        " All disorder terms are scaled by a dimensionless strength multiplier. "
        f"Disorder realisation r is generated from the root seed {cfg.run.seed} by a "
        "counter-based hash of (seed, r, lattice site), so a realisation is the same "
        "sample at every energy, gate voltage and field.")


def _sweep_section(cfg: SweepConfig, counts: Mapping, sampled: int | None = None) -> str:
    """The values of every sweep axis but the geometry, and the sample counts (``sampled``:
    devices per point of the edge-network model instead of realisations)."""
    clauses = []
    for dim, what, unit in (("energy", "the Fermi energy", "meV"),
                            ("gate_voltage", "the gate voltage", "V"),
                            ("b_perp", "the perpendicular field", "T"),
                            ("disorder_strength", "the disorder strength multiplier", "1")):
        values = cfg.axes[dim]
        verb = "was" if len(values) == 1 else "took the values"
        clauses.append(f"{what} {verb} {_axis_text(values, unit)}")
    sweep = "In the sweep, " + "; ".join(clauses[:-1]) + "; and " + clauses[-1] + "."
    stats = (f"At each sweep point {cfg.run.realisations} disorder realisations were requested "
             f"({counts['done']} samples computed, {counts['failed']} failed and "
             f"{counts['missing']} missing, counted over all sweep points).")
    if sampled is not None:
        stats = (f"At each sweep point {sampled} devices were sampled ({counts['done']} "
                 f"computed and {counts['failed']} failed, counted over all sweep points).")
    return sweep + " " + stats


def _measurement_phrase(label: str) -> str:
    m = parse_measurement(label)
    if m.kind == "G":
        return (f"{label}, the two-terminal conductance between contacts "
                f"{m.contacts[0]} and {m.contacts[1]} with all other contacts "
                f"floating (e^2/h)")
    src, drn, vp, vm = m.contacts
    return (f"{label}, the four-terminal resistance with current from {src} to "
            f"{drn} and voltage between {vp} and {vm} (h/e^2)")


def _transport_section(summary: Any, session: Mapping) -> str:
    """Scattering solver, Landauer-Buttiker measurements and the ideal reference values."""
    labels = [str(m) for m in summary["measurement"].values]
    ideal = []
    for label in labels:
        q = float(summary["quantised"].sel(measurement=label).values)
        unit = str(summary["unit"].sel(measurement=label).values)
        if math.isfinite(q):
            ideal.append(f"{label} = {_g(q)} {unit}")
    solver = session.get("kwant_solver", "unknown")
    text = (
        f"For each sample the full transmission matrix between all contacts was obtained from "
        f"the scattering matrix computed with Kwant {session.get('kwant', 'unknown')} "
        f"({_SOLVER_NAMES.get(solver, solver)}; BLAS: {_blas_phrase(session)}). "
        f"The reported quantities ({'; '.join(_measurement_phrase(x) for x in labels)}) follow "
        f"from the multi-terminal Landauer-Buttiker formulas, with voltage probes drawing no "
        f"net current."
    )
    if ideal:
        text += (" Ideal quantum spin Hall values for comparison come from the same "
                 f"solver applied to ideal helical-edge transmissions ({'; '.join(ideal)}).")
    return text


def _network_transport_section(summary: Any) -> str:
    """Landauer-Buttiker on the network's transmissions and the ideal reference values."""
    labels = [str(m) for m in summary["measurement"].values]
    ideal = [f"{x} = {_g(float(summary['quantised'].sel(measurement=x).values))} "
             f"{str(summary['unit'].sel(measurement=x).values)}" for x in labels
             if math.isfinite(float(summary["quantised"].sel(measurement=x).values))]
    text = (f"The reported quantities ({'; '.join(_measurement_phrase(x) for x in labels)}) "
            "follow from the multi-terminal Landauer-Buttiker formulas, with voltage probes "
            "drawing no net current.")
    if ideal:
        text += (" Ideal quantum spin Hall values for comparison come from ideal "
                 f"helical-edge transmissions ({'; '.join(ideal)}).")
    return text


def _statistics_section(summary: Any) -> str:
    """What the plotted values and error bars are (and any thermal smearing)."""
    text = (f"Plotted values are means over realisations; error bars are "
            f"{_bootstrap_text(summary.attrs)}; lighter bands show +-1 standard deviation of "
            f"the samples, and the standard error of the mean (std/sqrt(N)) is given in the "
            f"data files.")
    return text + _quality_text(summary) + _thermal_text(summary.attrs)


def _lstar_sections(cfg: SweepConfig) -> list[str]:
    """How L* and the two decay lengths were estimated: one text when a length is swept (L*
    is computed then), none otherwise."""
    geo = cfg.sweep.geometry
    if geo is None or "length" not in geo.parameter.lower() or len(geo.values) < 2:
        return []
    return [
        "The longest ballistic edge length L* was estimated from the length sweep with the "
        "measurement normalised per sample to t (1 = the quantised value): directly, as the "
        "length at which the mean of t first leaves 1 +- tol (linear interpolation between "
        "swept lengths), with a percentile-bootstrap interval over whole realisations; and "
        "from two fitted forms, incoherent backscattering <t> = 1/(1 + L/lambda) "
        "(L*_fit = lambda tol/(1 - tol)) and coherent localisation <ln t> = -L/xi "
        "(L*_fit = -xi ln(1 - tol)). A realisation is solved at every length with the same "
        "disorder on the overlapping sites, so the per-length means are correlated (the "
        "sample correlation of t between adjacent lengths is reported). The fits are "
        "generalised least squares (Aitken 1935) of the per-length means over the "
        "realisations usable at every fitted length, with the covariance estimated from the "
        "realisations and its correlations shrunk toward the identity with the analytic "
        "intensity of Schaefer and Strimmer (2005, target D); the weights are cross-fitted "
        "(each realisation weighted with the covariance of the others, leave-one-out up to 64 "
        "realisations, 64 folds beyond), which removes the bias of weights estimated from the "
        "same skewed values. Intervals of lambda, xi and L*_fit are Johnson's (1978) "
        "skewness-corrected Student t intervals (n - 1 degrees of freedom, n realisations) of "
        "the mean of the per-realisation influence values of the fitted rate 1/lambda or "
        "1/xi, mapped by 1/rate; their coverage was measured on synthetic correlated length "
        "sweeps (growing samples) at 92-95 % for a nominal 95 %, against 41-79 % for "
        "independent-length fits. Each form was tested by its generalised chi^2 with the "
        "sample covariance, as Hotelling's T^2 of the residual contrasts with an F(K - 1, "
        "n - K + 1) p-value (Hotelling 1931; a subset of n - 1 lengths when n <= K); a form "
        f"with p < {SIGNIFICANCE:g} was rejected. The better description is the form that "
        "passes while the other is rejected; 'indistinguishable' when both pass (then the "
        "realisations, or longer lengths, that would tell them apart are estimated from "
        "the second-order difference of the mean-field curves with equal initial slope, at "
        f"power {POWER:g}), 'neither' when both are rejected."
    ]


def _network_section(cfg: SweepConfig, attrs: Mapping) -> str:
    """The edge-network model, its numbers and its assumptions (from the store attributes)."""
    ec = cfg.edges
    comp = ("coherently (amplitudes, so interference and localisation are kept)"
            if ec.composition == "coherent" else
            "incoherently (probabilities: full dephasing between segments)")
    return (
        "Transport was modelled with the helical-edge network model (edge-network model), not "
        "by solving the whole device: with the Fermi level in the bulk gap, current flows "
        "along the outline, so the device is a network of edge sections joining neighbouring "
        "contacts, each a coherent scatterer, with the contacts as reservoirs. Before any "
        "computation the run was checked to keep every edge (also under gates) inside the bulk "
        "gap with exactly one helical pair per edge, every arm at least 4 edge decay lengths "
        f"wide ({_g(attrs.get('edge_decay_length_nm', float('nan')))} nm decay length; the "
        f"narrowest width was {_g(attrs.get('narrowest_width_nm', float('nan')))} nm) and the "
        "contacts further apart than ln(1/tolerance) evanescent decay lengths "
        f"(closest pair {_g(attrs.get('closest_contacts_nm', float('nan')))} nm). "
        "Each section's length was measured along the outline, corners included. Its parts "
        "along x and along y and under each set of gates were modelled by n = round(L / l_d) "
        f"segments drawn at random from pools of {ec.segments} independent disordered segments "
        f"of a {_g(attrs.get('pool_width_nm', float('nan')))} nm-wide strip of the same material "
        f"and disorder; a segment is {_g(attrs.get('segment_length_nm', float('nan')))} nm long "
        f"with clean buffers of {_g(attrs.get('buffer_nm', float('nan')))} nm at both ends "
        "(so that evanescent waves decay between neighbouring segments), and only its "
        f"disordered part l_d = {_g(attrs.get('disordered_length_nm', float('nan')))} nm counts "
        "as edge length. Both edges of a pool segment serve as edge scatterers (their coupling "
        "through the strip was at most "
        f"{float(attrs.get('max_inter_edge_leak', float('nan'))):.1e} in ||S^dagger S - 1||). "
        "Parts along y use pools whose onsite terms were turned by a quarter turn of the "
        "lattice model: the model's in-plane exchange acts on the E and H spins alike, so "
        "backscattering depends on the edge direction. A pool exists for every edge energy "
        "E - U_gate, field and disorder strength. Segments were composed along a section "
        f"{comp}; the pieces of a section under different gates or along different directions "
        "were joined without scattering (ideal interfaces) and pieces of one kind grouped, "
        "which reorders independent scatterers. Contacts of the well material absorb every "
        "arriving edge wave and emit into both neighbouring sections; metallic contacts were "
        "represented by a solved contact section (doped lead, clean well material) of the pool "
        "strip's width, not of the contact's own width. Disorder correlations do not cross a "
        "segment junction. For each sampled device the transmission matrix between all "
        "contacts followed from the network of the sections' transmission and reflection "
        "probabilities and the contacts (a wave that a metallic contact sends on into the "
        "next section is dephased there); device s draws the same segments at every sweep "
        "point."
    )


def _inputs_list(cfg: SweepConfig, attrs: Mapping, session: Mapping) -> str:
    network = "network" in str(attrs.get("model", ""))
    return "\n".join([
        f"- run: {cfg.run.name} (config hash {attrs.get('config_hash', '')[:16]})",
        f"- material preset: {cfg.material.preset or 'explicit parameters'}",
        f"- lattice constant: {_g(cfg.lattice.constant)} nm",
        (f"- model: edge network, {cfg.edges.composition}; sampled devices per point: "
         f"{cfg.edges.sequences}; pool segments: {cfg.edges.segments}" if network else
         f"- realisations requested: {cfg.run.realisations}"),
        f"- root seed: {cfg.run.seed}",
        f"- Kwant {session.get('kwant', 'unknown')}, solver {session.get('kwant_solver', 'unknown')}",
    ])


def methods_text(run: Any, facts: Mapping | None = None) -> str:
    """A methods paragraph describing how a run's numbers were computed.

    Parameters
    ----------
    run : pipeline.output.figures.RunData
        The run (configuration, samples, summary).
    facts : mapping, optional
        Store facts (:func:`store_facts`); read from the store when omitted.

    Returns
    -------
    str
        Markdown text: a heading, one paragraph to paste, and a short list of the inputs.
    """
    cfg = run.config
    facts = dict(facts) if facts is not None else store_facts(run.store_path)
    sessions = list(facts["attrs"].get("sessions", []))
    last = sessions[-1] if sessions else {}
    closing = ("All numbers are model estimates for an idealised device; they are not "
               "measurements and do not certify any device.")
    if "network" in str(facts["attrs"].get("model", "")):
        paragraph = " ".join([
            _material_section(cfg), _device_section(cfg), _contacts_and_gates_section(cfg),
            _disorder_section(cfg), _sweep_section(cfg, facts["counts"], cfg.edges.sequences),
            _network_section(cfg, facts["attrs"]),
            _network_transport_section(run.summary), _statistics_section(run.summary),
            *_lstar_sections(cfg),
            "The errors of the means also have a pool part: sampled devices share pool "
            "segments, so the interval over devices is optimistic; sem_pool in the data "
            "(the standard deviation of the mean over bootstrap resamples of the pools) "
            "includes it.", closing,
        ])
        return ("# Methods (generated)\n\n" + paragraph + "\n\n## Inputs at a glance\n\n"
                + _inputs_list(cfg, facts["attrs"], last) + "\n")
    paragraph = " ".join([
        _material_section(cfg), _device_section(cfg), _contacts_and_gates_section(cfg),
        _disorder_section(cfg), _sweep_section(cfg, facts["counts"]),
        _transport_section(run.summary, last), _statistics_section(run.summary),
        *_lstar_sections(cfg), closing,
    ])
    return ("# Methods (generated)\n\n" + paragraph + "\n\n## Inputs at a glance\n\n"
            + _inputs_list(cfg, facts["attrs"], last) + "\n")
