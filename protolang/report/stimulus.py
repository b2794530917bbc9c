"""Stimulus files for the rig: a plan in, one CSV file of samples per role and sweep type out.

Every role that is stimulated with a deterministic waveform (pulses, trains, steps, step
families, ramps, sines, chirps) or recorded in voltage clamp gets its distinct command
waveforms over the sweeps (:func:`protolang.plan.waveforms.library`), rendered directly at the
chosen sample rate. A current-clamped (or unrecorded) cell's file holds the injected current in
pA: the stimulus only, since a holding or bias current is set per cell at the rig and is stated
in the header instead. A voltage-clamped cell's file holds the command potential in mV (the
holding potential plus the protocol's command steps).

File ``<role>_sweeptype<k>.csv``: comment lines starting with ``#`` (protocol, role, cell
class, clamp mode, holding, sample rate, sweep length, the sweeps that use the waveform,
sweep interval, the injected charge for current injection, and the caution that the
protocol comes from a model), then the column header ``time_s,current_pA`` or
``time_s,command_mV``, then one line per sample. The charge stated is computed in closed form
from the plan (:func:`injected_charge`), not from the samples.

No Brian2 or matplotlib here.
"""

from __future__ import annotations

import argparse
import math
import os
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ..language.errors import ProtocolError, error
from ..plan.waveforms import library
from .write import _UMASK, atomic_write, slug

if TYPE_CHECKING:
    from ..plan.model import Plan, RolePlan, WaveSegment

DEFAULT_RATE = 20e3                 # Hz, a common acquisition and command rate of patch amplifiers
MIN_SAMPLES_PER_EDGE = 2            # a pulse or step shorter than 2 samples is not resolved
MIN_SAMPLES_PER_PERIOD = 10         # a sine or chirp needs at least 10 samples per period
MAX_SAMPLES = 20_000_000            # all files together; about 0.5 GB of text
STIMULUS_SUFFIX = ".csv"
CAUTION_LINE = ("model protocol: generated from an in-silico protocol on a computational model; "
                "check it against the lab's own approvals, safety rules and animal-care protocols (they take "
                "precedence) and every amplitude against the amplifier's limits and the cell's health before use")


@dataclass
class StimulusWaveform:
    """One distinct command waveform of one role, sampled at the export rate.

    Attributes:
        role: the role (cell) name.
        cell_class: its cell class.
        mode: "current clamp", "voltage clamp" or "off" (not recorded; current injected).
        sweep_type: 1-based number of this waveform among the role's distinct waveforms.
        n_types: how many distinct waveforms the role has.
        sweeps: 1-based sweep numbers that use this waveform.
        rate: sample rate (Hz).
        time: (n,) sample times (s), ``k / rate``.
        values: (n,) injected current (pA) or command potential (mV).
        column: the value column's header, ``current_pA`` or ``command_mV``.
        charge: injected charge of one sweep (C) in closed form; None in voltage clamp.
        sweep_index: 0-based sweep the waveform was rendered for (its first user).
    """

    role: str
    cell_class: str
    mode: str
    sweep_type: int
    n_types: int
    sweeps: list[int]
    rate: float
    time: np.ndarray
    values: np.ndarray
    column: str
    charge: float | None
    sweep_index: int

    @property
    def voltage_clamp(self) -> bool:
        return self.mode == "voltage clamp"

    @property
    def file_name(self) -> str:
        return f"{slug(self.role)}_sweeptype{self.sweep_type}{STIMULUS_SUFFIX}"

    @property
    def unit(self) -> str:
        return "mV" if self.voltage_clamp else "pA"


def exported_roles(plan: "Plan") -> list["RolePlan"]:
    """Roles that get stimulus files: stimulated with pulses or wave segments, or voltage-clamped
    (explicit spike sources have no membrane and get none)."""
    return [r for r in plan.roles
            if r.spike_times is None and (r.mode == "voltage clamp" or r.pulses or r.segments)]


def _segment_amplitude(seg: "WaveSegment", sweep: int) -> float:
    return float(seg.amplitude) if seg.per_sweep is None else float(seg.per_sweep[sweep])


def segment_charge(seg: "WaveSegment", amplitude: float) -> float:
    """Integral over time of one wave segment (A s = C for a current), in closed form.

    square: amplitude x length; ramp: mean of its two ends x length; sine: offset x T +
    amplitude (1 - cos 2 pi f T) / (2 pi f); chirp: the phase formula of
    :func:`protolang.plan.waveforms._segment` integrated numerically (scipy.integrate.quad).

    Args:
        seg: the segment.
        amplitude: its amplitude in the sweep (the family's value for a step family).

    Returns:
        The integral in SI (C for a current segment).
    """
    T = seg.stop - seg.start
    if seg.kind == "square":
        return amplitude * T
    if seg.kind == "ramp":
        return 0.5 * (amplitude + seg.amplitude_end) * T
    if seg.kind == "sine":
        w = 2 * math.pi * seg.frequency
        return seg.offset * T + amplitude * (1.0 - math.cos(w * T)) / w
    if seg.kind == "chirp":
        from scipy.integrate import quad

        f1, f2 = seg.frequency, seg.frequency_end
        cycles = 0.5 * (f1 + f2) * T

        def wave(tau: float) -> float:
            return amplitude * math.sin(2 * math.pi * (f1 * tau + (f2 - f1) * tau ** 2 / (2 * T)))
        value, _err = quad(wave, 0.0, T, limit=max(200, int(20 * cycles)), epsabs=0.0, epsrel=1e-10)
        return value
    raise AssertionError(f"internal error: unknown wave segment {seg.kind!r}")


def injected_charge(role: "RolePlan", sweep: int) -> float:
    """The charge (C) a current-injected role's stimulus delivers in one sweep, in closed form.

    Pulses count amplitude x duration; segments as :func:`segment_charge`. The holding or bias
    current is not part of the stimulus and is not counted. Noise and Poisson inputs are random
    and are not counted either.

    Args:
        role: a role that is not voltage-clamped.
        sweep: 0-based sweep (matters for a step family).

    Returns:
        The net charge in coulombs (negative for a net outward, hyperpolarising injection).

    Raises:
        ValueError: the role is voltage-clamped (its waveform is a command potential).
    """
    if role.mode == "voltage clamp":
        raise ValueError(f"role {role.name!r} is voltage-clamped: its waveform is a command potential, "
                         f"not an injected current")
    total = sum(p.amplitude * p.duration for p in role.pulses)
    for seg in role.segments:
        total += segment_charge(seg, _segment_amplitude(seg, sweep))
    return float(total)


def parse_rate(text: str | float, what: str = "--rate") -> float:
    """A sample rate from text such as ``"20 kHz"`` (protolang.language.units), in Hz.

    Args:
        text: the rate as typed (a number with a frequency unit), or a number of Hz.
        what: the option's name, for messages.

    Returns:
        The rate in Hz.

    Raises:
        ProtocolError: not a positive frequency.
    """
    from ..language.units import parse_quantity

    if isinstance(text, (int, float)):
        rate = float(text)
    else:
        try:
            q = parse_quantity(str(text))
        except ProtocolError:
            q = None
        if q is None or q.dimension != "frequency":
            raise error(f"{what} needs a sample rate, got {text!r}", None,
                        expected="a frequency with its unit, e.g. '20 kHz' or '10000 Hz'",
                        hint=f"for example {what} '20 kHz'") from None
        rate = q.si
    if not math.isfinite(rate) or rate <= 0:
        raise error(f"{what} must be a positive sample rate, got {text!r}", None,
                    expected="a frequency above 0, e.g. '20 kHz'", hint=f"for example {what} '20 kHz'")
    return rate


def _khz(rate: float) -> str:
    return f"{rate / 1e3:g} kHz"


def check_rate(plan: "Plan", rate: float) -> None:
    """Refuse a sample rate that cannot resolve the plan's stimuli or would write too many samples.

    Raises:
        ProtocolError: a pulse or step spans fewer than 2 samples, a sine or chirp gets fewer than
            10 samples per period, or all files together would hold more than 20 million samples.
    """
    roles = exported_roles(plan)
    for role in roles:
        edges = [(p.duration, f"the {p.duration * 1e3:g} ms pulse at {p.start * 1e3:g} ms") for p in role.pulses]
        edges += [(s.stop - s.start, f"the {s.kind} from {s.start * 1e3:g} ms to {s.stop * 1e3:g} ms")
                  for s in role.segments]
        for length, what in edges:
            if length * rate < MIN_SAMPLES_PER_EDGE - 1e-9:
                need = MIN_SAMPLES_PER_EDGE / length
                raise error(f"a sample rate of {_khz(rate)} cannot resolve {what} of {role.name!r} "
                            f"({length * rate:.3g} samples)", None,
                            expected=f"a rate of at least {_khz(need)} ({MIN_SAMPLES_PER_EDGE} samples across it)",
                            hint=f"for example --rate '{max(20.0, math.ceil(need / 1e3)):g} kHz'")
        for s in role.segments:
            top = max(s.frequency, s.frequency_end) if s.kind in ("sine", "chirp") else 0.0
            if top > 0 and rate < MIN_SAMPLES_PER_PERIOD * top - 1e-9:
                need = MIN_SAMPLES_PER_PERIOD * top
                raise error(f"a sample rate of {_khz(rate)} gives the {top:g} Hz {s.kind} of {role.name!r} fewer "
                            f"than {MIN_SAMPLES_PER_PERIOD} samples per period", None,
                            expected=f"a rate of at least {_khz(need)}", hint="raise --rate")
    n_steps = int(round(plan.sweep_length * rate))
    total = sum(n_steps * (int(_distinct_sweeps(role, plan.n_sweeps).max(initial=0)) + 1) for role in roles)
    if total > MAX_SAMPLES:
        raise error(f"the stimulus files would hold {total:,} samples at {_khz(rate)} "
                    f"(about {total * 25 / 1e6:.0f} MB of text)", None,
                    expected=f"at most {MAX_SAMPLES:,} samples over all files",
                    hint="lower --rate")


def _distinct_sweeps(role: "RolePlan", n_sweeps: int) -> np.ndarray:
    """Each sweep's waveform number, by the same key as waveforms.library, without rendering."""
    index, seen = np.zeros(n_sweeps, dtype=int), {}
    for k in range(n_sweeps):
        key = tuple(float(s.per_sweep[k]) if s.per_sweep is not None else 0.0 for s in role.segments)
        index[k] = seen.setdefault(key, len(seen))
    return index


def stimulus_waveforms(plan: "Plan", rate: float = DEFAULT_RATE) -> list[StimulusWaveform]:
    """Every exported role's distinct command waveforms over its sweeps, sampled at ``rate``.

    Args:
        plan: the resolved plan (``Experiment.plan``; no Brian2 needed).
        rate: sample rate in Hz; the waveforms are rendered at ``1 / rate`` directly.

    Returns:
        One :class:`StimulusWaveform` per role and sweep type, roles in plan order.

    Raises:
        ProtocolError: the rate cannot resolve the stimuli (:func:`check_rate`).
    """
    check_rate(plan, rate)
    dt = 1.0 / rate
    n_steps = int(round(plan.sweep_length * rate))
    time = np.arange(n_steps) / rate
    out: list[StimulusWaveform] = []
    for role in exported_roles(plan):
        waves, index = library(role, plan.n_sweeps, dt, n_steps)
        clamp = role.mode == "voltage clamp"
        for k in range(waves.shape[1]):
            users = [int(s) for s in np.flatnonzero(index == k)]
            if clamp:
                values = (float(role.holding_potential or 0.0) + waves[:, k]) * 1e3
            else:
                values = waves[:, k] * 1e12
            out.append(StimulusWaveform(
                role=role.name, cell_class=role.cell_class, mode=role.mode, sweep_type=k + 1,
                n_types=waves.shape[1], sweeps=[s + 1 for s in users], rate=rate, time=time, values=values,
                column="command_mV" if clamp else "current_pA",
                charge=None if clamp else injected_charge(role, users[0]), sweep_index=users[0]))
    return out


def sweep_ranges(sweeps: list[int]) -> str:
    """``[1, 2, 3, 5]`` -> ``"1-3, 5"``."""
    parts, start, prev = [], None, None
    for s in sorted(sweeps):
        if start is None:
            start = prev = s
        elif s == prev + 1:
            prev = s
        else:
            parts.append(f"{start}-{prev}" if prev != start else f"{start}")
            start = prev = s
    if start is not None:
        parts.append(f"{start}-{prev}" if prev != start else f"{start}")
    return ", ".join(parts)


def holding_text(role: "RolePlan") -> str:
    """How the cell is held, in words: a potential (voltage clamp, or current clamp by a bias
    current set per cell at the rig) or an injected current."""
    if role.mode == "voltage clamp":
        return f"{role.holding_potential * 1e3:g} mV command potential (included in the command column)"
    bias = np.asarray(role.holding_current if role.holding_current is not None else [0.0], dtype=float) * 1e12
    if role.holding_potential is not None:
        return (f"{role.holding_potential * 1e3:g} mV, reached by a bias current set per cell at the rig "
                f"(the model's cells needed {bias.min():.3g} to {bias.max():.3g} pA); not included in the "
                f"current column")
    if np.any(bias != 0):
        return f"{bias[0]:.4g} pA injected throughout; not included in the current column"
    return "none (the cell at rest, no bias current)"


def mode_text(role: "RolePlan") -> str:
    """The recording mode in words (an unrecorded cell's membrane is free, as in current clamp)."""
    if role.mode == "voltage clamp":
        return role.mode
    if not role.recorded:
        return "not recorded (free membrane, as in current clamp)"
    return role.mode


def _edges_off_grid(role: "RolePlan", rate: float) -> bool:
    times = [p.start for p in role.pulses] + [p.start + p.duration for p in role.pulses]
    times += [t for s in role.segments for t in (s.start, s.stop)]
    return any(abs(t * rate - round(t * rate)) > 1e-6 for t in times)


def stimulus_header(plan: "Plan", role: "RolePlan", wave: StimulusWaveform, scan: str | None = None) -> list[str]:
    """The comment lines of one stimulus file (without the leading ``# ``); ``scan`` names the scan point."""
    n = len(wave.time)
    lines = [
        "protolang stimulus file",
        f"protocol: {plan.title}",
        f"protocol file: {Path(plan.protocol_file).name} (sha256 {plan.protocol_hash or 'unknown'})",
    ]
    if scan:
        lines.append(f"scan point: {scan}")
    lines += [
        f"role: {role.name}",
        f"cell class: {role.cell_class}",
        f"clamp mode: {mode_text(role)}",
        f"holding: {holding_text(role)}",
    ]
    if role.mode == "voltage clamp" and role.series_resistance is not None:
        lines.append(f"series resistance assumed by the model: {role.series_resistance / 1e6:g} MOhm")
    lines += [
        f"sample rate: {wave.rate:g} Hz (one sample every {1e6 / wave.rate:g} us)",
        f"sweep length: {plan.sweep_length * 1e3:g} ms ({n} samples)",
        f"sweep type: {wave.sweep_type} of {wave.n_types}",
        f"sweeps using this waveform: {sweep_ranges(wave.sweeps)} ({len(wave.sweeps)} of {plan.n_sweeps})",
        f"sweep interval: {plan.interval:g} s (start to start)",
    ]
    if wave.charge is not None:
        lines.append(f"injected charge: {wave.charge * 1e12:.6g} pC per sweep (net, closed form from the "
                     f"protocol's pulses and segments; holding current not included)")
    else:
        lines.append("injected charge: not applicable (voltage clamp: the file holds the command potential)")
    if _edges_off_grid(role, wave.rate):
        lines.append("note: some stimulus edges fall between samples and are rounded to the nearest sample")
    extra = []
    if role.noise:
        extra.append(f"{len(role.noise)} random noise input(s)")
    if role.poisson:
        extra.append(f"{len(role.poisson)} Poisson synaptic input(s)")
    if extra:
        lines.append("not in this file: " + ", ".join(extra) + " of the model (random, not a command waveform)")
    lines.append(CAUTION_LINE)
    return lines


def stimulus_csv(plan: "Plan", wave: StimulusWaveform, scan: str | None = None) -> str:
    """The whole text of one stimulus file."""
    role = plan.role(wave.role)
    head = "".join(f"# {line}\n" for line in stimulus_header(plan, role, wave, scan))
    body = "\n".join(f"{t:.10g},{v:.10g}" for t, v in zip(wave.time.tolist(), wave.values.tolist()))
    return f"{head}time_s,{wave.column}\n{body}\n"


def write_stimulus_files(plan: "Plan", waves: list[StimulusWaveform], folder: str | os.PathLike,
                         scan: str | None = None) -> list[Path]:
    """Write the files of ``waves`` into ``folder`` (created), each one atomically; ``scan`` names the point.

    Returns:
        The paths written, in the order of ``waves``.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    texts = [(folder / w.file_name, stimulus_csv(plan, w, scan)) for w in waves]   # everything computed first
    written = []
    for path, text in texts:
        def write(tmp: str, text: str = text) -> None:
            with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
                fh.write(text)
        written.append(atomic_write(path, write))
    return written


def refuse_existing(out: Path, force: bool, owned, what: str) -> None:
    """Refuse an existing output folder unless ``force``; even then, refuse one that holds files
    this command did not write (``owned(relative name) -> bool`` tells ours apart).

    Raises:
        ProtocolError: the folder exists without ``force``, is a file, or holds other files.
    """
    if not out.exists():
        return
    if not out.is_dir():
        raise error(f"{what} {str(out)!r} exists and is not a folder", None,
                    expected="a new folder name", hint="choose another --out")
    if not force:
        raise error(f"{what} {str(out)!r} already exists", None, expected="a new folder name",
                    hint="choose another --out or pass --force to replace it")
    foreign = sorted(p.name for p in out.iterdir() if not owned(p))
    if foreign:
        shown = ", ".join(foreign[:5]) + (" ..." if len(foreign) > 5 else "")
        raise error(f"{what} {str(out)!r} holds files protolang did not write ({shown}); --force replaces only "
                    f"a folder written by this command", None, expected="a new or protolang-written folder",
                    hint="choose another --out")


def replace_folder(tmp: Path, out: Path) -> None:
    """Move the finished temporary folder ``tmp`` to ``out`` (replacing an existing ``out``)."""
    os.chmod(tmp, 0o777 & ~_UMASK)   # mkdtemp makes 0700; an output folder is meant to be shared
    if out.exists():
        shutil.rmtree(out)
    os.replace(tmp, out)


def temporary_folder(out: Path) -> Path:
    """A new temporary folder next to ``out`` (same file system, so the final rename is atomic)."""
    out.parent.mkdir(parents=True, exist_ok=True)
    return Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))


def _is_stimulus_file(path: Path) -> bool:
    stem = path.name[:-len(STIMULUS_SUFFIX)] if path.name.endswith(STIMULUS_SUFFIX) else ""
    return path.is_file() and "_sweeptype" in stem and stem.rsplit("_sweeptype", 1)[1].isdigit()


def export_stimuli(plan: "Plan", out_dir: str | os.PathLike, rate: float = DEFAULT_RATE, *,
                   force: bool = False, scan: str | None = None) -> list[Path]:
    """Write one stimulus CSV file per role and sweep type into the new folder ``out_dir``.

    All waveforms are computed first, then written into a temporary folder next to ``out_dir``
    that is renamed into place, so ``out_dir`` is either complete or absent.

    Args:
        plan: the resolved plan.
        out_dir: the folder to create.
        rate: sample rate in Hz.
        force: replace an existing folder that holds only stimulus files.
        scan: the scan point, as text for the headers (e.g. "2 of 5: @rate = 20 Hz").

    Returns:
        The files written (final paths).

    Raises:
        ProtocolError: an existing ``out_dir`` (see :func:`refuse_existing`), a rate that cannot
            resolve the stimuli, or a plan without any stimulated or voltage-clamped cell.
    """
    out = Path(out_dir).resolve()
    refuse_existing(out, force, _is_stimulus_file, "stimulus folder")
    waves = stimulus_waveforms(plan, rate)
    if not waves:
        raise error(f"protocol {Path(plan.protocol_file).name!r} gives no cell a command waveform", None,
                    expected="a `stimulate CELL:` block with pulses, trains, steps, ramps, sines or chirps, "
                             "or a cell recorded in voltage clamp",
                    hint="explicit spike times, noise and Poisson inputs have no stimulus file")
    tmp = temporary_folder(out)
    try:
        names = [p.name for p in write_stimulus_files(plan, waves, tmp, scan)]
        replace_folder(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return [out / n for n in names]


def scan_text(exp, point: int) -> str | None:
    """``"K of N: @name = value, ..."`` for a scanned protocol's point (0-based), None without a scan."""
    points = exp.points()
    if len(points) < 2 and not points[0][0]:
        return None
    values = ", ".join(f"@{n} = {q}" for n, q in points[point][0].items())
    return f"{point + 1} of {len(points)}: {values}"


def plan_point(exp, point: int):
    """``exp.plan(point)`` (0-based) with a clear error for a point outside the scan.

    Raises:
        ProtocolError: no such scan point.
    """
    n = len(exp.points())
    if not 0 <= point < n:
        raise error(f"--point {point + 1} is outside the protocol's scan points (1 to {n})", None,
                    expected=f"a point number from 1 to {n}",
                    hint="`protolang plan FILE --point K` shows each point" if n > 1 else
                    "this protocol has no scan, so leave --point out")
    return exp.plan(point)


def cmd_stimulus(args: argparse.Namespace) -> int:
    """``protolang stimulus``: write the stimulus files of one protocol (one scan point).

    Args:
        args: parsed by the parser that :func:`add_stimulus_parser` adds.

    Returns:
        0 on success.

    Raises:
        ProtocolError: a bad protocol, rate, point or output folder.
    """
    from ..api import load

    rate = parse_rate(args.rate)
    exp = load(args.file)
    plan = plan_point(exp, args.point - 1)
    paths = export_stimuli(plan, args.out, rate, force=args.force, scan=scan_text(exp, args.point - 1))
    waves = {w.file_name: w for w in stimulus_waveforms(plan, rate)}
    for path in paths:
        w = waves[path.name]
        charge = f", {w.charge * 1e12:.4g} pC per sweep" if w.charge is not None else ""
        print(f"{path}: {w.role} ({w.mode}), sweeps {sweep_ranges(w.sweeps)}{charge}")
    print(f"{len(paths)} stimulus file(s) at {rate:g} Hz written to {Path(args.out)}")
    return 0


def add_stimulus_parser(subparsers) -> argparse.ArgumentParser:
    """Add the ``stimulus`` subcommand (``set_defaults(func=cmd_stimulus)``) to an argparse subparsers object.

    Returns:
        The new subparser.
    """
    p = subparsers.add_parser("stimulus", help="write each cell's stimulus waveforms as CSV files for the rig")
    p.add_argument("file", metavar="FILE", help="protocol file")
    p.add_argument("--out", required=True, metavar="DIR", help="folder to create for the CSV files")
    p.add_argument("--rate", default="20 kHz", help="sample rate of the files, e.g. '20 kHz' (default 20 kHz)")
    p.add_argument("--point", type=int, default=1, metavar="K", help="scan point to export (1-based; default 1)")
    p.add_argument("--force", action="store_true", help="replace an existing folder of stimulus files")
    p.set_defaults(func=cmd_stimulus)
    return p
