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
from xo_fit.errors import DataError, JobError, NetworkError, XoFitError
from xo_fit.job.model import MAX_ANGLE_VALUES, FileCurve, FlatResponse, Job, Resistive, SplicedResponse, ThieleSmall
from xo_fit.job.model import ModelImpedance
from xo_fit.constants import P_REF
from xo_fit.io.measure import Curve, read_curve
from xo_fit.physics.extension import Splice, extend_curve, splice_curves
from xo_fit.model.diffraction import Baffled, baffled, job_positions, times
from xo_fit.physics.curves import on_grid
from xo_fit.physics.geometry import Placement, acoustic_centres, placement_factors, placement_warnings
from xo_fit.physics.thiele_small import small_signal_impedance
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
    splice: Splice | None = None  # a spliced response's join, else None
    baffle: Baffled | None = None  # the baffle's diffraction its data take, else None


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
    """A job with its data loaded: the grid, every driver on it and the compiled network (see the module).

    Attributes
    ----------
    job : Job
        The validated job.
    frequencies : ndarray
        The grid, in Hz, shape (F,).
    drivers : tuple of DriverData
        Each driver on the grid, in job order (D drivers).
    network : Network
        The compiled crossover network.
    factors : ndarray
        Pa per V at each driver's terminals on the axis, placement included, complex, shape (D, F).
    warnings : tuple of str
        One-line warnings from loading the data (doubtful but legal values).
    positions : tuple
        An off-axis job's measuring positions, ``("h" | "v", degrees)`` each, the axis first (A positions);
        empty otherwise.
    angle_factors : ndarray or None
        Pa per V of each driver at each position, complex, shape (A, D, F); None for an on-axis job.
    placements : tuple
        Each driver's :class:`~xo_fit.physics.geometry.Placement` (position, phase, about).
    """
    job: Job
    frequencies: np.ndarray
    drivers: tuple[DriverData, ...]
    network: Network
    factors: np.ndarray  # Pa per V at each driver's terminals on the axis, placement included, (D, F)
    warnings: tuple[str, ...] = field(default=())
    positions: tuple = ()  # an off-axis job's measuring positions, ("h"|"v", deg), the axis first; () otherwise
    angle_factors: np.ndarray | None = None  # Pa per V of each driver at each position, (A, D, F)
    placements: tuple = ()  # each driver's Placement (physics/geometry.py): position, phase, about

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
        """The network solved for part values (B, P) or (P,) in SI units with the compiled kernel: driver
        voltages (B, D, F) in V and input impedance (B, F) in ohm, complex."""
        return self.network.solve(values)

    def simulate(self, values: np.ndarray, *, dense: bool = False, angles: bool = False) -> Simulation:
        """Driver voltages, input impedance, per-driver and summed pressure for values (B, P) or (P,).

        dense: solve with the dense reference path instead of the compiled kernel (for one design that
        is reported, not searched: it needs no kernel loaded; the two agree to 1e-9).
        angles: also the summed pressure at every position of an off-axis job (``Simulation.angles``).
        """
        sol = self.network.solve_reference(values) if dense else self.network.solve(values)
        p = acoustics.pressures(sol.voltages, self.factors)
        at_angles = (acoustics.angle_pressures(sol.voltages, self.angle_factors)
                     if angles and self.angle_factors is not None else None)
        return Simulation(voltages=sol.voltages, impedance=sol.impedance, pressure=p, total=acoustics.total(p),
                          angles=at_angles)

    def reference_db(self, sim: Simulation) -> np.ndarray:
        """dB SPL (B, F) of the curve the system target applies to, for a Simulation: the on-axis sum, or (with
        ``[target] reference = "listening_window"``) the listening window, from its positions alone."""
        if self.job.target.reference != "listening_window" or self.angle_factors is None:
            return acoustics.spl_db(sim.total)
        w = acoustics.curve_weights(self.positions)["listening_window"]
        assert w is not None  # load_system refuses this reference where the window's positions are missing
        lw = {"listening_window": w}
        return acoustics.power_db(acoustics.curve_sums(sim.voltages, self.angle_factors, lw)["listening_window"])


def _angle_data(spec, positions: tuple, d: DriverData, grid: np.ndarray, warnings: list[str]) -> np.ndarray:
    """The driver's response at every position (the axis first: its ``response``), complex Pa (A, F). Each
    file is read and put on the grid as ``response`` is (same extension, same phase); a spliced driver's files
    are far fields, each spliced with its near field at the same frequency and with the on-axis splice's level
    shift (the near field the same at every angle). An error names the driver and the position."""
    from xo_fit.errors import DataError

    files = spec.angles.files()
    out = np.empty((len(positions), grid.size), dtype=complex)
    out[0] = d.response
    splice = d.splice
    near = read_curve(spec.response.near, "response") if splice is not None else None
    baffle = d.baffle if near is not None else None  # a near field times D at each position
    per_position = baffle is not None
    done: dict = {}  # a mirrored position is its file's data again
    for i, pos in enumerate(positions[1:], start=1):
        path, source = files[pos]
        if path in done and not per_position:
            out[i] = out[done[path]]
            continue
        where = f"[driver.{spec.name}.angles] {pos[0]}{source}" + (f" (mirrored to {pos[0]}{pos[1]} too)"
                                                                  if source != pos[1] else "")
        try:
            curve = read_curve(path, "response")
            if near is not None and splice is not None:
                curve = splice_curves(times(near, baffle.response[i]) if baffle is not None else near, curve,
                                      splice.splice_hz, gain_db=splice.gain_db).curve
            out[i], w = on_grid(extend_curve(curve, grid, "response", spec.extend_low, spec.extend_high), grid,
                                "response", spec.phase)
        except DataError as e:
            raise DataError(e.message, path=e.path, line=e.line, key=where) from None
        warnings += w if path not in done else []
        done[path] = i
    _check_twins(spec, positions, out, grid, warnings)
    out.setflags(write=False)
    return out


#: Two files of one position (-180 and 180) that differ by more than this somewhere (dB) get a warning.
TWIN_TOLERANCE_DB = 0.1


def _check_twins(spec, positions: tuple, data: np.ndarray, grid: np.ndarray, warnings: list[str]) -> None:
    """A position listed twice (-180 and 180, or the rear on both orbits) is read from its first file; each other
    file of it is read too, and a one-line warning names it where its level differs by more than 0.1 dB."""
    from xo_fit.errors import DataError

    files = spec.angles.files()
    for pos, path, name in spec.angles.twins():
        used = files[pos][0]
        try:
            twin, _ = on_grid(extend_curve(read_curve(path, "response"), grid, "response", spec.extend_low,
                                           spec.extend_high), grid, "response", spec.phase)
        except DataError as e:
            raise DataError(e.message, path=e.path, line=e.line, key=f"[driver.{spec.name}.angles] {name}") from None
        with np.errstate(divide="ignore"):
            diff = np.abs(20 * np.log10(np.abs(twin) / np.abs(data[positions.index(pos)])))
        k = int(np.argmax(np.where(np.isnan(diff), np.inf, diff)))
        if not diff[k] <= TWIN_TOLERANCE_DB:
            warnings.append(f"[driver.{spec.name}.angles] {name} is the same position as {pos[0]}{pos[1]}, whose "
                            f"file is used: {path} differs from {used} by {diff[k]:.2f} dB at {grid[k]:.0f} Hz")


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


def _check_preference(job: Job, positions: tuple) -> None:
    """[cost] preference needs the score for every candidate: all 70 positions and a grid the model can use."""
    if job.cost.preference <= 0:
        return
    from xo_fit.model.preference import make_plan

    key = "[cost] preference"
    if not positions:
        raise JobError("the predicted preference needs off-axis responses: give every driver a [driver.NAME.angles] "
                       "table with the 70 positions of ANSI/CTA-2034-A", path=job.path, key=key)
    missing = acoustics.missing_positions(positions, "sound_power")
    if missing:
        names = ", ".join(f"{o}{a}" for o, a in missing[:8]) + (" ..." if len(missing) > 8 else "")
        raise JobError(f"the predicted preference needs the sound power, whose positions the drivers' angles lack: "
                       f"{names}", path=job.path, key=key)
    reasons = make_plan(job.grid.frequencies).reasons
    if reasons:
        name, why = next(iter(reasons.items()))
        raise JobError(f"the predicted preference cannot be had on this grid: {name}: {why}", path=job.path, key=key)


def _driver_data_of(job: Job, spec, grid: np.ndarray, warnings: list[str], positions: tuple = ()) -> DriverData:
    """:func:`_driver_data`, a missing or unreadable data file tied to the driver and the job line naming it
    (a bare "file not found" once named neither, with the path as written, ../ and all)."""
    import os

    try:
        return _driver_data(job, spec, grid, warnings, positions)
    except DataError as e:
        access = ("not found", "cannot read", "not a regular file", "is a folder")
        if e.line is not None or e.path is None or not any(a in e.message for a in access):
            raise  # a file that was read: its own path and line say where
        named = os.path.normpath(str(e.path))
        key = next((k for k, v in (("response", spec.response), ("impedance", spec.impedance))
                    if named in {os.path.normpath(str(p)) for p in _paths_of(v)}), None)
        from xo_fit.job.reading import job_line

        line = job_line(job, ("driver", spec.name), key)
        where = f"[driver.{spec.name}]" + (f" {key}" if key else "")
        raise DataError(f"{e.message}: {named}", path=job.path or named, line=line, key=where) from None


def _paths_of(source) -> list:
    """The data files a response or impedance source names."""
    if isinstance(source, FileCurve):
        return [source.path]
    if isinstance(source, SplicedResponse):
        return [source.near, source.far]
    return []


def _driver_data(job: Job, spec, grid: np.ndarray, warnings: list[str], positions: tuple = ()) -> DriverData:
    resp_curve = imp_curve = splice = bd = None
    if isinstance(spec.response, FlatResponse):
        response = np.full(grid.size, P_REF * 10 ** (spec.response.level_db / 20.0), dtype=complex)
        rphase = "ideal"
    elif isinstance(spec.response, SplicedResponse):
        sp = spec.response
        near = read_curve(sp.near, "response")
        bd = baffled(job, spec, near, grid, positions)
        splice = splice_curves(times(near, bd.response[0]) if bd is not None else near, read_curve(sp.far, "response"),
                               sp.splice_hz)
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
        bd = baffled(job, spec, None, grid, positions)
    if isinstance(spec.impedance, Resistive):
        impedance = np.full(grid.size, spec.impedance.resistance, dtype=complex)
        iphase = "ideal"
    elif isinstance(spec.impedance, ThieleSmall):
        impedance = small_signal_impedance(spec.impedance, grid)
        iphase = "ideal"
    elif isinstance(spec.impedance, ModelImpedance):  # the [driver.NAME.ts] model in its box
        from xo_fit.model.drivers import model_impedance

        impedance = model_impedance(job, spec, grid)
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
                      impedance_phase=iphase, response_curve=resp_curve, impedance_curve=imp_curve, splice=splice,
                      baffle=bd)


def _file_baffle(d: DriverData) -> DriverData:
    """A baffle = true file (a half-space curve or a near field alone): its on-axis response and its angle files
    times ``D`` at each position (a splice's near field took ``D`` before it was spliced)."""
    if d.baffle is None or d.splice is not None:
        return d
    from dataclasses import replace

    response = d.response * d.baffle.response[0]
    response.setflags(write=False)
    angles = None
    if d.angle_responses is not None:
        angles = d.angle_responses * d.baffle.response
        angles.setflags(write=False)
    return replace(d, response=response, angle_responses=angles)


def branches_for(job: Job) -> list[Branch]:
    """The job's parts as solver branches (valued ones in job order)."""
    index = {d.name: i for i, d in enumerate(job.drivers)}
    out = []
    for p in job.parts:
        if p.type == "driver":
            assert p.driver is not None  # the reader requires a driver part to name its driver
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
    positions = job_positions(job)
    if len(positions) * len(job.drivers) * grid.size > MAX_ANGLE_VALUES:  # memory, checked before any file is read
        raise JobError(f"{len(positions)} positions x {len(job.drivers)} drivers x {grid.size} points is more off-axis "
                       f"data than xo_fit holds (at most {MAX_ANGLE_VALUES:,}): fewer angles or grid points",
                       path=job.path, key="[driver.NAME.angles]")
    _check_curves(job, positions)
    _check_preference(job, positions)
    from xo_fit.model.drivers import driver_models

    driver_models(job)  # every [driver.NAME.ts] and .box completed and checked before any file is read
    drivers = tuple(_driver_data_of(job, d, grid, warnings, positions) for d in job.drivers)
    if positions:
        from dataclasses import replace

        drivers = tuple(replace(d, angle_responses=_angle_data(spec, positions, d, grid, warnings))
                        for d, spec in zip(drivers, job.drivers))
    drivers = tuple(_file_baffle(d) for d in drivers)
    zd = np.stack([d.impedance for d in drivers])
    network = compile_network(branches_for(job), [d.name for d in job.drivers], grid, zd,
                              job.source_voltage, job.source_resistance, context=str(job.path) if job.path else None)
    placements = tuple(_placement(spec, d) for spec, d in zip(job.drivers, drivers))
    warnings += placement_warnings(placements, off_axis=bool(positions), distance=job.distance)
    factors, angle_factors = _acoustic_factors(job, drivers, placements, positions, grid)
    return System(job=job, frequencies=grid, drivers=drivers, network=network, factors=factors,
                  warnings=tuple(warnings), positions=positions, angle_factors=angle_factors, placements=placements)


def _placement(spec, d: DriverData) -> Placement:
    """Where a driver is and what its data hold, as the geometry sees it (physics/geometry.py)."""
    x, y = spec.position if spec.position is not None else (0.0, 0.0)
    could_measure = (isinstance(spec.response, FileCurve) and spec.extend_low == spec.extend_high == "none"
                     and spec.about != "driver")  # a phase column the job could have used, holding the geometry
    in_files = could_measure and d.response_curve is not None and d.response_curve.phase_deg is not None
    return Placement(name=spec.name, x=x, y=y, offset=spec.offset, positioned=spec.position is not None,
                     phase=d.response_phase, about=spec.about, phase_in_files=in_files)


def _acoustic_factors(job: Job, drivers: tuple, placements: tuple, positions: tuple,
                      grid: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """Pa per V of each driver on the axis (D, F) and at every position of an off-axis job (A, D, F), or None.

    Each driver's response is divided by its reference voltage and multiplied by its placement factor
    (:func:`~xo_fit.physics.geometry.placement_factors`): the propagation from its acoustic centre to the
    listening point for data that do not carry the geometry, the offset delay for data that do. A job without
    positions and distance gets the offset delay on the axis bit for bit as before.
    """
    centres = acoustic_centres([p.x for p in placements], [p.y for p in placements], [p.offset for p in placements])
    try:
        place = placement_factors(positions or (("h", 0),), centres, [not p.carries for p in placements], grid,
                                  speed_of_sound=job.speed_of_sound, distance=job.distance)  # (A, D, F)
    except XoFitError as e:
        raise JobError(e.message, path=job.path, key="[acoustics] distance") from None
    vref = np.array([d.reference_voltage for d in job.drivers])
    factors = np.stack([d.response for d in drivers]) / vref[:, None] * place[0]
    factors.setflags(write=False)
    angle_factors = None
    if positions:
        per_volt = np.ones((len(drivers), grid.size)) / vref[:, None]  # 1 / V_ref, (D, F)
        angle_factors = np.stack([d.angle_responses for d in drivers], axis=1) * (per_volt[None] * place)
        angle_factors.setflags(write=False)
    return factors, angle_factors


def derive_system(system: System, job: Job) -> System:
    """``system`` for a job with another netlist over the same drivers and grid (a part removed, say): the
    network is built anew, the drivers' data reused. Raises JobError when the netlist is not a legal one."""
    if [d.name for d in job.drivers] != [d.name for d in system.job.drivers]:
        raise JobError("a derived job must keep the drivers", path=job.path)
    try:
        network = compile_network(branches_for(job), [d.name for d in job.drivers], system.frequencies,
                                  system.network.driver_impedance, job.source_voltage, job.source_resistance,
                                  context=str(job.path) if job.path else None)
    except NetworkError:
        check_netlist(job)  # the netlist's own fault, as a JobError at the part's line (it checks as compiling does)
        raise
    return System(job=job, frequencies=system.frequencies, drivers=system.drivers, network=network,
                  factors=system.factors, warnings=(), positions=system.positions,
                  angle_factors=system.angle_factors, placements=system.placements)
