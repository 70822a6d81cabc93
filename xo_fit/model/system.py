"""A job with its data loaded: the grid, every driver on it, the compiled network.

:func:`load_system` is the one place that turns a validated :class:`~xo_fit.job.Job`
into arrays: it reads the measurement files, puts them on the grid (deriving
minimum phase where asked), builds the netlist and compiles its solver. The
resulting :class:`System` is what every later stage (simulate, fit, snap,
spread, batch) works on; it is picklable, so a batch worker or a cluster node
gets the job and its data without a shared disk.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from xo_fit.model import acoustics
from xo_fit.physics.coils import DCR_EXPONENT, dcr_coefficient
from xo_fit.errors import JobError, NetworkError
from xo_fit.job.model import MAX_ANGLE_VALUES, FileCurve, FlatResponse, Job, Resistive, SplicedResponse, ThieleSmall
from xo_fit.constants import P_REF
from xo_fit.io.measure import Curve, read_curve
from xo_fit.physics.extension import extend_curve, splice_curves
from xo_fit.physics.curves import on_grid
from xo_fit.solver.netlist import check_topology
from xo_fit.solver.network import Branch, Network, Solution, compile_network


@dataclass(frozen=True, eq=False)
class DriverData:
    """One driver on the grid.

    response: complex Pa at the driver's reference voltage, (F,).
    impedance: complex ohm, (F,).
    response_phase / impedance_phase: where the phase came from: "measured",
    "minimum" (derived from the magnitude) or "ideal" (a flat or resistive stand-in,
    or a Thiele-Small model).
    response_curve / impedance_curve: the file as read, or None.
    """

    name: str
    response: np.ndarray
    impedance: np.ndarray
    response_phase: str
    impedance_phase: str
    response_curve: Curve | None = None
    impedance_curve: Curve | None = None
    angle_responses: np.ndarray | None = None  # complex Pa at the reference voltage at System.positions, (A, F)
    splice: object = None  # a spliced response's join (xo_fit.physics.extension.Splice), else None


@dataclass(frozen=True, eq=False)
class Simulation:
    """Acoustic and electrical result of a batch of designs.

    voltages: complex V, (B, D, F); impedance: complex ohm, (B, F);
    pressure: complex Pa per driver, (B, D, F); total: complex Pa, (B, F);
    angles: the summed complex Pa at every position of an off-axis job, (B, A, F), else None.
    """

    voltages: np.ndarray
    impedance: np.ndarray
    pressure: np.ndarray
    total: np.ndarray
    angles: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class System:
    job: Job
    frequencies: np.ndarray
    drivers: tuple[DriverData, ...]
    network: Network
    factors: np.ndarray  # Pa per V at each driver's terminals, offset delay included, (D, F)
    warnings: tuple[str, ...] = field(default=())
    positions: tuple = ()  # an off-axis job's measuring positions, ("h"|"v", deg), the axis first; () otherwise
    angle_factors: np.ndarray | None = None  # Pa per V of each driver at each position, (A, D, F)

    @property
    def part_names(self) -> tuple[str, ...]:
        """Names of the valued parts: the columns of a values array (B, P)."""
        return tuple(p.name for p in self.job.valued_parts)

    def values(self, overrides: dict[str, float] | None = None) -> np.ndarray:
        """The job's own part values (SI, shape (P,)), with ``overrides`` by part name taken first.

        Raises JobError for a part that has neither a value nor an override.
        """
        overrides = overrides or {}
        out = []
        for p in self.job.valued_parts:
            if p.name in overrides:
                out.append(float(overrides[p.name]))
            elif p.value is not None:
                out.append(p.value)
            else:
                raise JobError(f"part {p.name} has only a range (min..max); give it a value to simulate, "
                               "or simulate a fit's values with --from RESULT",
                               path=self.job.path, key=f"part {p.name}")
        return np.array(out, dtype=float)

    def solve(self, values: np.ndarray) -> Solution:
        return self.network.solve(values)

    def simulate(self, values: np.ndarray, *, dense: bool = False, angles: bool = False) -> Simulation:
        """Driver voltages, input impedance, per-driver and summed pressure for values (B, P) or (P,).

        dense: solve with the dense reference path instead of the compiled kernel (for one design that
        is reported, not searched: it needs no kernel loaded; the two agree to 1e-9).
        angles: also the summed pressure at every position of an off-axis job (``Simulation.angles``).
        """
        sol = self.network.solve_reference(values) if dense else self.network.solve(values)
        p = acoustics.pressures(sol.voltages, self.factors)
        angles = (acoustics.angle_pressures(sol.voltages, self.angle_factors)
                  if angles and self.angle_factors is not None else None)
        return Simulation(voltages=sol.voltages, impedance=sol.impedance, pressure=p, total=acoustics.total(p),
                          angles=angles)

    def reference_db(self, sim: Simulation) -> np.ndarray:
        """dB SPL (B, F) of the curve the system target applies to, for a Simulation: the on-axis sum, or (with
        ``[target] reference = "listening_window"``) the listening window, from its positions alone."""
        if self.job.target.reference != "listening_window" or self.angle_factors is None:
            return acoustics.spl_db(sim.total)
        lw = {"listening_window": acoustics.curve_weights(self.positions)["listening_window"]}
        return acoustics.power_db(acoustics.curve_sums(sim.voltages, self.angle_factors, lw)["listening_window"])


def _angle_data(spec, positions: tuple, response: np.ndarray, grid: np.ndarray, warnings: list[str]) -> np.ndarray:
    """The driver's response at every position (the axis first: its ``response``), complex Pa (A, F). Each
    file is read and put on the grid as ``response`` is (same extension, same phase); an error names the
    driver and the position."""
    from xo_fit.errors import DataError

    files = spec.angles.files()
    out = np.empty((len(positions), grid.size), dtype=complex)
    out[0] = response
    done: dict = {}  # a mirrored position is its file's data again
    for i, pos in enumerate(positions[1:], start=1):
        path, source = files[pos]
        if path in done:
            out[i] = out[done[path]]
            continue
        where = f"[driver.{spec.name}.angles] {pos[0]}{source}" + (f" (mirrored to {pos[0]}{pos[1]} too)"
                                                                  if source != pos[1] else "")
        try:
            curve = read_curve(path, "response")
            out[i], w = on_grid(extend_curve(curve, grid, "response", spec.extend_low, spec.extend_high), grid,
                                "response", spec.phase)
        except DataError as e:
            raise DataError(e.message, path=e.path, line=e.line, key=where) from None
        warnings += w
        done[path] = i
    out.setflags(write=False)
    return out


def _positions(job: Job) -> tuple:
    """The measuring positions of an off-axis job, the axis first (then horizontal, vertical, by angle)."""
    first = next((d for d in job.drivers if d.angles is not None), None)
    if first is None:
        return ()
    rest = sorted(first.angles.files(), key=lambda p: (p[0] != "h", p[1]))
    return (("h", 0), *rest)


def _check_curves(job: Job, positions: tuple) -> None:
    """A cost on an off-axis curve needs that curve's positions (and an off-axis job at all)."""
    needs = [("listening_window", "[target] reference", job.target.reference == "listening_window"),
             ("early_reflections", "[cost] early_reflections", job.cost.early_reflections > 0),
             ("sound_power", "[cost] sound_power", job.cost.sound_power > 0)]
    for curve, key, used in needs:
        if not used:
            continue
        if not positions:
            raise JobError(f"the {curve.replace('_', ' ')} needs off-axis responses: give every driver a "
                           "[driver.NAME.angles] table", path=job.path, key=key)
        missing = acoustics.missing_positions(positions, curve)
        if missing:
            names = ", ".join(f"{o}{a}" for o, a in missing[:8]) + (" ..." if len(missing) > 8 else "")
            hint = ("; mirror = true in [driver.NAME.angles] lets h+a's file stand for h-a"
                    if any(o == "h" and a < 0 for o, a in missing) else "")
            raise JobError(f"the {curve.replace('_', ' ')} needs positions the drivers' angles lack: {names}{hint}",
                           path=job.path, key=key)


def _driver_data(job: Job, spec, grid: np.ndarray, warnings: list[str]) -> DriverData:
    resp_curve = imp_curve = splice = None
    if isinstance(spec.response, FlatResponse):
        response = np.full(grid.size, P_REF * 10 ** (spec.response.level_db / 20.0), dtype=complex)
        rphase = "ideal"
    elif isinstance(spec.response, SplicedResponse):
        sp = spec.response
        splice = splice_curves(read_curve(sp.near, "response"), read_curve(sp.far, "response"), sp.splice_hz)
        resp_curve = splice.curve
        response, w = on_grid(extend_curve(resp_curve, grid, "response", spec.extend_low, spec.extend_high), grid,
                              "response", spec.phase)
        warnings += w
        rphase = spec.phase
    else:
        assert isinstance(spec.response, FileCurve)
        resp_curve = read_curve(spec.response.path, "response")
        response, w = on_grid(extend_curve(resp_curve, grid, "response", spec.extend_low, spec.extend_high), grid,
                              "response", spec.phase)
        warnings += w
        rphase = spec.phase
    if isinstance(spec.impedance, Resistive):
        impedance = np.full(grid.size, spec.impedance.resistance, dtype=complex)
        iphase = "ideal"
    elif isinstance(spec.impedance, ThieleSmall):
        impedance = spec.impedance.impedance(grid)
        iphase = "ideal"
    else:
        imp_curve = read_curve(spec.impedance.path, "impedance")
        impedance, w = on_grid(extend_curve(imp_curve, grid, "impedance", spec.impedance_extend_low,
                                            spec.impedance_extend_high), grid, "impedance", spec.impedance_phase)
        warnings += w
        iphase = spec.impedance_phase
        if np.any(impedance.real <= 0):
            f_bad = grid[np.argmax(impedance.real <= 0)]
            warnings.append(f"{imp_curve.path}: the impedance has a real part at or below 0 near {f_bad:.0f} Hz "
                            "(phase beyond +-90 deg), which no passive driver has; check the phase column")
    for arr in (response, impedance):
        arr.setflags(write=False)
    return DriverData(name=spec.name, response=response, impedance=impedance, response_phase=rphase,
                      impedance_phase=iphase, response_curve=resp_curve, impedance_curve=imp_curve, splice=splice)


def branches_for(job: Job) -> list[Branch]:
    """The job's parts as solver branches (valued ones in job order)."""
    index = {d.name: i for i, d in enumerate(job.drivers)}
    out = []
    for p in job.parts:
        if p.type == "driver":
            out.append(Branch(p.name, "D", p.nodes[0], p.nodes[1], driver=index[p.driver]))
        elif p.type == "L" and p.dcr_wire:
            out.append(Branch(p.name, "L", p.nodes[0], p.nodes[1], r_coef=dcr_coefficient(p.dcr), r_exp=DCR_EXPONENT))
        elif p.type == "L":
            out.append(Branch(p.name, "L", p.nodes[0], p.nodes[1], r_coef=p.dcr))
        elif p.type == "C":
            out.append(Branch(p.name, "C", p.nodes[0], p.nodes[1], r_coef=p.esr))
        else:
            out.append(Branch(p.name, "R", p.nodes[0], p.nodes[1]))
    return out


def check_netlist(job: Job) -> None:
    """The job's netlist checked as a graph (no data read); a NetworkError becomes a JobError at the part's line."""
    try:
        check_topology([(p.name, p.nodes[0], p.nodes[1]) for p in job.parts])
    except NetworkError as e:
        name = e.key[len("part "):] if e.key and e.key.startswith("part ") else None
        line = job.part_lines.get(name) if name else None
        raise JobError(e.message, path=job.path, line=line, key=e.key or "netlist") from None


def load_system(job: Job) -> System:
    """Read every driver's data onto the grid and compile the network.

    Raises DataError (a measurement file) or NetworkError (the netlist) with the file named.
    """
    check_netlist(job)
    grid = job.grid.frequencies
    warnings: list[str] = list(job.warnings)
    positions = _positions(job)
    if len(positions) * len(job.drivers) * grid.size > MAX_ANGLE_VALUES:  # memory, checked before any file is read
        raise JobError(f"{len(positions)} positions x {len(job.drivers)} drivers x {grid.size} points is more off-axis "
                       f"data than xo_fit holds (at most {MAX_ANGLE_VALUES:,}): fewer angles or grid points",
                       path=job.path, key="[driver.NAME.angles]")
    _check_curves(job, positions)
    drivers = tuple(_driver_data(job, d, grid, warnings) for d in job.drivers)
    if positions:
        from dataclasses import replace

        drivers = tuple(replace(d, angle_responses=_angle_data(spec, positions, d.response, grid, warnings))
                        for d, spec in zip(drivers, job.drivers))
    zd = np.stack([d.impedance for d in drivers])
    network = compile_network(branches_for(job), [d.name for d in job.drivers], grid, zd,
                              job.source_voltage, job.source_resistance, context=str(job.path) if job.path else None)
    factors = acoustics.driver_factors(
        np.stack([d.response for d in drivers]),
        np.array([d.reference_voltage for d in job.drivers]),
        np.array([d.offset for d in job.drivers]),
        grid, job.speed_of_sound)
    factors.setflags(write=False)
    angle_factors = None
    if positions:
        per_volt = acoustics.driver_factors(  # 1 / V_ref and the offset delay, (D, F)
            np.ones((len(drivers), grid.size)), np.array([d.reference_voltage for d in job.drivers]),
            np.array([d.offset for d in job.drivers]), grid, job.speed_of_sound)
        angle_factors = np.stack([d.angle_responses for d in drivers], axis=1) * per_volt[None]  # (A, D, F)
        angle_factors.setflags(write=False)
    return System(job=job, frequencies=grid, drivers=drivers, network=network, factors=factors,
                  warnings=tuple(warnings), positions=positions, angle_factors=angle_factors)


def derive_system(system: System, job: Job) -> System:
    """``system`` for a job with another netlist over the same drivers and grid (a part removed, say): the
    network is built anew, the drivers' data reused. Raises JobError when the netlist is not a legal one."""
    check_netlist(job)
    if [d.name for d in job.drivers] != [d.name for d in system.job.drivers]:
        raise JobError("a derived job must keep the drivers", path=job.path)
    network = compile_network(branches_for(job), [d.name for d in job.drivers], system.frequencies,
                              system.network.driver_impedance, job.source_voltage, job.source_resistance,
                              context=str(job.path) if job.path else None)
    return System(job=job, frequencies=system.frequencies, drivers=system.drivers, network=network,
                  factors=system.factors, warnings=(), positions=system.positions,
                  angle_factors=system.angle_factors)
