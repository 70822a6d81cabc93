"""Job files: the contract's example loads; every malformed case is one line naming file, line and key, exit 2."""

from __future__ import annotations

import numpy as np
import pytest

from xo_fit.errors import JobError
from xo_fit.job.model import DEFAULTS
from xo_fit.job.reader import load_job

from conftest import flat_curve, resistive_curve

DATA = {"data/woofer-response.txt": flat_curve(), "data/woofer-impedance.txt": resistive_curve(),
        "data/tweeter-response.txt": flat_curve(), "data/tweeter-impedance.txt": resistive_curve()}

# a complete two-way example job (every table of the format), without an inventory line
CONTRACT = '''\
name = "bookshelf-2way"

[grid]
f_min = 20
f_max = 20000
points = 320

[source]
voltage = 2.83
resistance = 0.05

[acoustics]
speed_of_sound = 343.0

[driver.woofer]
response = "data/woofer-response.txt"
impedance = "data/woofer-impedance.txt"
reference_voltage = 2.83
offset = "18mm"
phase = "measured"

[driver.tweeter]
response = "data/tweeter-response.txt"
impedance = "data/tweeter-impedance.txt"

[[part]]
name = "L1"
type = "L"
nodes = ["in", "w1"]
value = "1.5mH"
min = "0.2mH"
max = "4mH"
dcr = 0.32
tolerance = "3%"

[[part]]
name = "C1"
type = "C"
nodes = ["w1", "0"]
min = "2uF"
max = "40uF"

[[part]]
name = "WOOFER"
type = "driver"
driver = "woofer"
nodes = ["w1", "0"]

[[part]]
name = "C2"
type = "C"
nodes = ["in", "t1"]
min = "2uF"
max = "20uF"

[[part]]
name = "L2"
type = "L"
nodes = ["t1", "0"]
min = "0.1mH"
max = "2mH"

[[part]]
name = "TWEETER"
type = "driver"
driver = "tweeter"
nodes = ["0", "t1"]

[target]
band = [150, 15000]
level = "auto"
curve = "flat"

[target.way.woofer]
type = "lowpass"
alignment = "LR"
order = 4
fc = 2200

[target.way.tweeter]
type = "highpass"
alignment = "LR"
order = 4
fc = 2200

[cost]
way = 1.0
sum = 1.0
phase = 0.5
impedance_min = 3.2

[search]
optimizer = "auto"
budget = 20000
seed = 1

[snap]
series = { L = "E12", C = "E12", R = "E24" }

[spread]
samples = 2000
seed = 1
distribution = "uniform"
tolerance = { R = "5%", L = "5%", C = "5%" }
'''


def test_contract_example_loads(write_job):
    job = load_job(write_job(CONTRACT, DATA))
    assert job.name == "bookshelf-2way"
    assert job.grid.points == 320 and job.grid.frequencies[0] == 20 and job.grid.frequencies[-1] == 20000
    assert job.source_resistance == 0.05 and job.driver("woofer").offset == pytest.approx(0.018)
    l1 = job.part("L1")
    assert (l1.value, l1.min, l1.max, l1.dcr, l1.tolerance) == (pytest.approx(1.5e-3), pytest.approx(0.2e-3),
                                                                pytest.approx(4e-3), 0.32, pytest.approx(0.03))
    assert [p.name for p in job.free_parts] == ["L1", "C1", "C2", "L2"]
    assert job.part("TWEETER").nodes == ("0", "t1")
    assert job.driver("tweeter").response.path.is_absolute()
    assert job.target.ways[1].fc == 2200 and job.cost.impedance_min == 3.2
    assert dict(job.snap.series) == {"L": "E12", "C": "E12", "R": "E24"}
    with pytest.raises(Exception):
        job.name = "x"  # frozen


def test_defaults_live_in_one_place(write_job):
    text = '''\
    [driver.d]
    response = 90
    impedance = 8
    [[part]]
    name = "R1"
    type = "R"
    nodes = ["in", "a"]
    value = "2R2"
    [[part]]
    name = "D"
    type = "driver"
    driver = "d"
    nodes = ["a", "0"]
    '''
    job = load_job(write_job(text))
    assert job.name == "job"
    assert job.grid.points == DEFAULTS["grid"]["points"]
    assert job.source_voltage == DEFAULTS["source"]["voltage"]
    assert job.speed_of_sound == DEFAULTS["acoustics"]["speed_of_sound"]
    assert job.search.budget == DEFAULTS["search"]["budget"]
    assert job.part("R1").value == pytest.approx(2.2)


def test_per_octave_grid(write_job):
    job = load_job(write_job(CONTRACT.replace("points = 320", "per_octave = 24"), DATA))
    f = job.grid.frequencies
    assert f[0] == 20 and f[-1] == 20000
    assert (f.size - 1) / np.log2(1000) >= 24


BAD = [
    # (replace this, with this, the line the error must name (a text on it), text in the message)
    ('points = 320', 'pionts = 320', 'pionts', "[grid]: unknown key 'pionts' (did you mean 'points'?)"),
    ('offset = "18mm"', 'offset = "18 kg"', 'offset', "[driver.woofer] offset: '18 kg' is not a value in m"),
    ('value = "1.5mH"', 'value = "1.5uF"', 'value = "1.5uF"', "part L1 value: '1.5uF' is not a value in H"),
    ('min = "0.2mH"', 'min = "5mH"', 'max = "4mH"', "part L1 max: must be above min"),
    ('dcr = 0.32', 'dcr = "x"', 'dcr', "part L1 dcr: cannot read 'x' as a value in Ω; expected ohms or a wire"),
    ('tolerance = "3%"', 'tolerance = "3"', 'tolerance', "part L1 tolerance: cannot read '3' as a percentage"),
    ('type = "C"\nnodes = ["w1", "0"]', 'type = "Q"\nnodes = ["w1", "0"]', 'type = "Q"', "part C1 type: expected one of"),
    ('nodes = ["w1", "0"]\nmin = "2uF"', 'nodes = ["w1", "w1"]\nmin = "2uF"', '"w1", "w1"', "shorted onto one node"),
    ('driver = "woofer"', 'driver = "wofer"', 'wofer', "part WOOFER driver: unknown driver 'wofer'"),
    ('nodes = ["in", "t1"]', 'nodes = ["in", "tl"]', '"tl"', "node 'tl' connects to part C2 only"),
    ('name = "L2"', 'name = "C2"', 'name = "C2"\ntype = "L"', "duplicate part name 'C2'"),
    ('band = [150, 15000]', 'band = [15000, 150]', 'band', "[target] band: the high end must be above the low end"),
    ('order = 4\nfc = 2200\n\n[target.way.tweeter]', 'order = 3\nfc = 2200\n\n[target.way.tweeter]', 'order = 3',
     "a Linkwitz-Riley alignment has an even order"),
    ('phase = 0.5', 'phase = "half"', 'phase = "half"', "[cost] phase: expected a number"),
    ('budget = 20000', 'budget = 2.5', 'budget', "[search] budget: expected a whole number"),
    ('series = { L = "E12", C = "E12", R = "E24" }', 'series = { Q = "E12" }', 'series', "unknown part kind 'Q'"),
    ('distribution = "uniform"', 'distribution = "flat"', 'distribution', "expected one of 'uniform', 'normal'"),
    ('[acoustics]', '[acoustic]', '[acoustic]', "job: unknown key 'acoustic' (did you mean 'acoustics'?)"),
    ('voltage = 2.83\nresistance', 'voltage = 2.83 V\nresistance', 'voltage = 2.83 V', "invalid TOML"),
    ('type = "driver"\ndriver = "tweeter"', 'type = "driver"\ndriver = "tweeter"\nvalue = 3', 'value = 3',
     "a driver part takes only name, type, nodes and driver"),
]


def _line_of(text: str, marker: str) -> int:
    i = text.index(marker)
    return text.count("\n", 0, i) + 1


@pytest.mark.parametrize("old, new, marker, message", BAD)
def test_bad_jobs_name_file_line_and_key_through_the_cli(write_job, cli, old, new, marker, message):
    assert old in CONTRACT, old
    text = CONTRACT.replace(old, new, 1)
    path = write_job(text, DATA)
    code, out, err = cli("check", path)
    assert code == 2, (out, err)
    lines = err.strip().splitlines()
    assert len(lines) == 1, err  # one line, no traceback
    shown = path.resolve() if "TOML" not in message else path
    assert lines[0].startswith(f"xo-fit: error: {shown}:{_line_of(text, marker)}: "), err
    assert message in lines[0], err


def test_unused_driver_and_missing_things(write_job):
    base = '''\
    [driver.a]
    response = 90
    impedance = 8
    [driver.b]
    response = 90
    impedance = 8
    [[part]]
    name = "A"
    type = "driver"
    driver = "a"
    nodes = ["in", "0"]
    '''
    with pytest.raises(JobError, match="driver 'b' is defined but no") as e:
        load_job(write_job(base))
    assert e.value.line == 4
    with pytest.raises(JobError, match="no drivers"):
        load_job(write_job('[[part]]\nname="R"\ntype="R"\nnodes=["in","0"]\nvalue=1\n'))
    with pytest.raises(JobError, match="job file not found"):
        load_job(write_job("").parent / "nope.toml")


def test_wire_dcr_and_letter_codes(write_job):
    text = CONTRACT.replace("dcr = 0.32", 'dcr = "18awg"').replace('value = "1.5mH"', 'value = "1m5"')
    job = load_job(write_job(text, DATA))
    l1 = job.part("L1")
    assert l1.dcr_wire and l1.dcr == pytest.approx(1.0237e-3, rel=1e-3) and l1.value == pytest.approx(1.5e-3)


def test_job_and_system_pickle(write_job):
    """A batch worker or cluster node gets the loaded job and its data by pickling."""
    import pickle

    from xo_fit.model.system import load_system

    job = load_job(write_job(CONTRACT, DATA))
    j2 = pickle.loads(pickle.dumps(job))
    assert j2 == job and dict(j2.snap.series) == dict(job.snap.series)
    with pytest.raises(TypeError):
        job.snap.series["L"] = "E6"
    s = load_system(job)
    s2 = pickle.loads(pickle.dumps(s))
    np.testing.assert_array_equal(s2.simulate(s2.values({"C1": 1e-5, "C2": 5e-6, "L2": 1e-3})).total,
                                  s.simulate(s.values({"C1": 1e-5, "C2": 5e-6, "L2": 1e-3})).total)


def test_a_typo_in_a_required_key_is_named(write_job):
    """`fc_hihg` once gave "fc_high: missing" without naming the unknown key that was meant."""
    from conftest import ladder_job

    text, _ = ladder_job("LR2")
    text = text.replace('[target.way.tweeter]\ntype = "highpass"', '[target.way.tweeter]\ntype = "bandpass"\nfc_low = 1000\nfc_hihg = 3000')
    text = text.replace('type = "bandpass"\nfc_low = 1000\nfc_hihg = 3000\nalignment = "LR"\norder = 2\nfc = 2000.0', 'type = "bandpass"\nfc_low = 1000\nfc_hihg = 3000\nalignment = "LR"\norder = 2')
    with pytest.raises(JobError, match="fc_hihg") as e:
        load_job(write_job(text))
    assert "fc_high" in str(e.value) and "missing" in str(e.value)


def test_a_missing_data_file_names_its_driver_and_job_line(write_job, cli):
    """A missing file once gave only "<path as written>: response file not found": now the job line, the driver
    and key, and the path normalised."""
    job = write_job("""
[grid]
points = 41
[driver.w]
response = "data/../data/nothere.txt"
impedance = 8
[[part]]
name = "W"
type = "driver"
driver = "w"
nodes = ["in", "0"]
""")
    code, _, err = cli("check", job)
    assert code == 2
    assert f"{job}:5: [driver.w] response: " in err and "not found" in err
    assert "data/nothere.txt" in err and "/../" not in err
