"""A property-based fuzz of the loaders: any mutated job or data file gives exit 0 or 2, never a traceback.

Starting from a valid two-way job with measured data files, hypothesis replaces values, keys, lines and bytes
with hostile ones (non-finite and huge numbers, wrong types, deep nesting, control characters, odd encodings,
truncated files) and runs ``check`` and ``simulate`` through the command line in-process. Exit 0 (accepted,
perhaps with warnings) or 2 (one line naming what is wrong) are the only outcomes allowed; anything else, an
exception included, is a bug. XO_FIT_FUZZ_EXAMPLES sets the number of cases (default 120 per property).
"""

from __future__ import annotations

import os
import re
import shutil
import tempfile
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from xo_fit.cli.app import main

N = int(os.environ.get("XO_FIT_FUZZ_EXAMPLES", "120"))
FUZZ = settings(max_examples=N, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

F = np.geomspace(10, 40000, 60)
RESPONSE = "".join(f"{f:.4f} {88 + 2 * np.sin(i / 5):.3f} {-30 * np.log10(f / 10):.2f}\n" for i, f in enumerate(F))
IMPEDANCE = "".join(f"{f:.4f} {6 + 20 / (1 + (np.log(f / 60) * 3) ** 2):.3f} {10 * np.sin(i / 7):.2f}\n"
                    for i, f in enumerate(F))

LINES = [
    'name = "fuzz"',
    "[grid]", "f_min = 40", "f_max = 18000", "points = 40",
    "[source]", "voltage = 2.83", "resistance = 0.05",
    "[driver.woofer]", 'response = "w-r.txt"', 'impedance = "w-z.txt"', 'phase = "minimum"',
    "[driver.tweeter]", 'response = "t-r.txt"', 'impedance = "t-z.txt"', 'offset = "5mm"',
    "[[part]]", 'name = "L1"', 'type = "L"', 'nodes = ["in", "w1"]', 'value = "1.2mH"', 'min = "0.3mH"',
    'max = "3mH"', 'dcr = "18awg"',
    "[[part]]", 'name = "C1"', 'type = "C"', 'nodes = ["w1", "0"]', 'value = "10uF"',
    "[[part]]", 'name = "W"', 'type = "driver"', 'driver = "woofer"', 'nodes = ["w1", "0"]',
    "[[part]]", 'name = "C2"', 'type = "C"', 'nodes = ["in", "t1"]', 'value = "6.8uF"', 'tolerance = "5%"',
    "[[part]]", 'name = "L2"', 'type = "L"', 'nodes = ["t1", "0"]', 'value = "0.4mH"',
    "[[part]]", 'name = "R1"', 'type = "R"', 'nodes = ["t1", "t2"]', 'value = "2R2"', 'rating = "10W"',
    "[[part]]", 'name = "T"', 'type = "driver"', 'driver = "tweeter"', 'nodes = ["0", "t2"]',
    "[target]", "band = [80, 15000]", 'level = "auto"', 'curve = "flat"',
    "[target.way.woofer]", 'type = "lowpass"', "order = 2", "fc = 2200",
    "[target.way.tweeter]", 'type = "highpass"', "order = 2", "fc = 2200",
    "[cost]", "way = 1.0", "phase = 0.5", "impedance_min = 3.2",
    "[spread]", "samples = 50",
    "[stress]", "power = 50", "rated_impedance = 6",
]
DATA = {"w-r.txt": RESPONSE, "w-z.txt": IMPEDANCE, "t-r.txt": RESPONSE, "t-z.txt": IMPEDANCE}

HOSTILE_VALUES = [
    "nan", "inf", "-inf", "1e308", "-1e308", "1e-300", "5e-324", "0", "-0.0", "-1", "1e30", "1e6", '""', '" "',
    '"nan"', '"inf"', '"1e999"', '"4,2mH"', '"1MH"', '"33qF"', '"10"', '"2k2"', '"R"', '"µ"', '"1.2.3"', "[]",
    "[1, 2]", "{}", "{a = 1}", "true", '"\\u0000"', '"a\\nb"', '"$\\\\frac{1}{$"', '"../x"', '"/dev/zero"',
    '"/dev/null"', '"."', '".."', '"x/y"', "1979-05-27", '"' + "x" * 5000 + '"', "[" * 60 + "]" * 60,
    '"' + "é" * 50 + '"', "12345678901234567890", '"0x10"', '"1e-3H"', '"1 mH"', '"18 awg"', '"99awg"',
]


def _run(job_text: str, files: dict[str, bytes | str], args: tuple[str, ...]) -> int:
    folder = Path(tempfile.mkdtemp(prefix="xo_fit-fuzz-"))
    try:
        for name, content in files.items():
            (folder / name).write_bytes(content if isinstance(content, bytes) else content.encode())
        (folder / "job.toml").write_text(job_text, encoding="utf-8", errors="surrogatepass")
        code = main([args[0], str(folder / "job.toml"), *[a.replace("OUT", str(folder / "out")) for a in args[1:]]])
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return code


mutation = st.one_of(
    st.tuples(st.just("value"), st.integers(0, len(LINES) - 1), st.sampled_from(HOSTILE_VALUES)),
    st.tuples(st.just("drop"), st.integers(0, len(LINES) - 1), st.just("")),
    st.tuples(st.just("key"), st.integers(0, len(LINES) - 1), st.sampled_from(
        ["dcrr", "raiting", "per_octav", "fc_hi", "per_octave", "points", "time_limit", "robust", "series",
         "inventory", "fixed", "esr", "le_exponent", "extend_low", "", " ", "a.b", '"quoted key"'])),
    st.tuples(st.just("text"), st.integers(0, len(LINES) - 1), st.text(max_size=30)),
)


def _mutate(muts) -> str:
    lines = list(LINES)
    for kind, i, arg in muts:
        line = lines[i]
        if kind == "drop":
            lines[i] = ""
        elif kind == "value" and "=" in line:
            lines[i] = line.split("=", 1)[0] + "= " + arg
        elif kind == "key" and "=" in line:
            lines[i] = arg + " =" + line.split("=", 1)[1]
        elif kind == "text":
            lines[i] = line + arg
    return "\n".join(lines) + "\n"


@FUZZ
@given(st.lists(mutation, min_size=1, max_size=4))
def test_fuzzed_jobs_give_exit_0_or_2(muts):
    text = _mutate(muts)
    for args in (("check",), ("simulate", "--out", "OUT", "--no-plots")):
        assert _run(text, DATA, args) in (0, 2)


def _mutate_data(content: str, op, data) -> bytes:
    raw = content.encode()
    if op == "utf16":
        return content.encode("utf-16")
    if op == "utf16-odd":
        return content.encode("utf-16")[:-1]
    if op == "truncate":
        return raw[: data.draw(st.integers(0, len(raw)))]
    if op == "bytes":
        pos = data.draw(st.integers(0, len(raw)))
        return raw[:pos] + data.draw(st.binary(max_size=20)) + raw[pos:]
    if op == "line":
        lines = content.splitlines()
        k = data.draw(st.integers(0, len(lines) - 1))
        lines[k] = data.draw(st.sampled_from(["1e30 1e30 1e30", "100 nan 0", "100 inf", "-5 80 0", "0 80 0",
                                             "100 1e6", "100 -1e5 0", "1e308 80 0", "5e-324 80", "100;80;0",
                                             "100,5 80,2", "100 80 1e308", "100 0 0", "100 -3 0", "x y z",
                                             "100 80 0 0 0 0"]))
        return ("\n".join(lines) + "\n").encode()
    return raw


@FUZZ
@given(st.sampled_from(sorted(DATA)), st.sampled_from(["utf16", "utf16-odd", "truncate", "bytes", "line"]),
       st.data())
def test_fuzzed_data_files_give_exit_0_or_2(name, op, data):
    files = dict(DATA)
    files[name] = _mutate_data(DATA[name], op, data)
    text = "\n".join(LINES) + "\n"
    for args in (("check",), ("simulate", "--out", "OUT", "--no-plots")):
        assert _run(text, files, args) in (0, 2)


def _job(replace: dict[str, str] | None = None, add: str = "") -> str:
    lines = list(LINES)
    for old, new in (replace or {}).items():
        i = lines.index(old)
        lines[i] = new
    return "\n".join(lines) + "\n" + add


def _cli(tmp_path, text: str, files: dict | None = None, command: str = "check"):
    from xo_fit.cli.app import main as run_main

    for name, content in {**DATA, **(files or {})}.items():
        (tmp_path / name).write_bytes(content if isinstance(content, bytes) else content.encode())
    (tmp_path / "job.toml").write_text(text, encoding="utf-8")
    import contextlib
    import io

    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        args = [command, str(tmp_path / "job.toml")] + (["--out", str(tmp_path / "o"), "--no-plots"]
                                                         if command != "check" else [])
        code = run_main(args)
    return code, err.getvalue()


import pytest  # noqa: E402


@pytest.mark.parametrize("replace, add, files, message", [
    ({'level = "auto"': "level = nan"}, "", None, r"\[target\] level: expected \"auto\" or a level"),
    ({"way = 1.0": "way = inf"}, "", None, r"\[cost\] way: expected a finite number"),
    ({"way = 1.0": "way = 1e308"}, "", None, r"\[cost\] way: must be at most 1e\+06"),
    ({"points = 40": "points = 200000"}, "", None, r"points: must be at most 100000"),
    ({"f_min = 40": "f_min = 1e-300"}, "", None, r"f_min: 1e-300 Hz is outside"),
    ({"f_max = 18000": "f_max = 1e300"}, "", None, r"f_max: 1e\+300 Hz is outside"),
    ({'response = "t-r.txt"': "response = 1e6"}, "", None, r"a flat driver's level must be -300 to 300"),
    ({'response = "t-r.txt"': 'response = "t\\u0000r.txt"'}, "", None, r"cannot hold control characters"),
    ({'response = "t-r.txt"': 'response = "/dev/zero"'}, "", None, r"response: the response file is not a regular file.*: /dev/zero"),
    ({"voltage = 2.83": "voltage = 1e308"}, "", None, r"\[source\] voltage: 1e\+308 V is outside"),
    ({}, "x = " + "[" * 50000 + "]" * 50000 + "\n", None, r"nested too deeply"),
    ({}, "", {"w-r.txt": RESPONSE.encode("utf-16")[:-1]}, r"w-r.txt: the response file starts as UTF-16 but is not"),
    ({}, "", {"w-r.txt": RESPONSE.replace("\n", "\n100000.5 1e30 0\n", 1)}, r"w-r.txt:2: level \(dB\) 1e\+30 is outside"),
    ({'value = "1.2mH"': 'value = "1,2mH"'}, "", None, r"part L1 value: '1,2mH': a comma in a value"),
    ({'value = "10uF"': 'value = "33qF"'}, "", None, r"unknown prefix 'q'"),
    ({'dcr = "18awg"': 'dcrr = "18awg"'}, "", None, r"unknown key 'dcrr' \(did you mean 'dcr'\?\)"),
    ({'rating = "10W"': 'raiting = "10W"'}, "", None, r"did you mean 'rating'"),
    ({"points = 40": "per_octav = 12"}, "", None, r"did you mean 'per_octave'"),
    ({"[target.way.tweeter]": "[target.way.tweeter]\nfc_hi = 3000"}, "", None, r"did you mean 'fc_high'"),
    ({"band = [80, 15000]": "band = [30000, 40000]"}, "", None, r"\[target\] band: the band 30000-40000 Hz holds no"),
    ({'curve = "flat"': 'curve = "no-such-curve"'}, "", None, r"no target curve 'no-such-curve'"),
    ({'curve = "flat"': 'curve = "missing.txt"'}, "", None, r"target curve file .*missing.txt not found"),
])
def test_bad_numbers_and_files_are_input_errors(tmp_path, replace, add, files, message):
    """Each of these once passed validation or ended in a traceback; now: exit 2 and one line saying what."""
    code, err = _cli(tmp_path, _job(replace, add), files)
    assert code == 2, err
    assert len(err.strip().splitlines()) == 1, err
    assert re.search(message, err), err


def test_doubtful_values_warn_on_one_line_each(tmp_path):
    """Legal but implausible part values (common practice for crossover parts; ranges in job.ranges.PLAUSIBLE) warn."""
    text = _job({'value = "10uF"': "value = 10", 'value = "0.4mH"': 'value = "1MH"'})
    code, err = _cli(tmp_path, text)
    assert code == 0, err
    warnings = [x for x in err.splitlines() if x.startswith("warning:")]
    assert len(warnings) == 2, err
    assert re.search(r"job.toml:\d+: part C1: value 10 F lies outside what a crossover uses", warnings[0])
    assert "part L2: value 1 MH" in warnings[1]


@pytest.mark.parametrize("replace", [
    {'name = "fuzz"': 'name = "$\\\\frac{1}{$"'},            # matplotlib would read it as broken mathtext
    {'value = "2R2"': "value = 1e-12"},                       # the smallest resistance allowed: a near short
    {'value = "10uF"': "value = 1e-300"},                    # a capacitor that is no capacitor
])
def test_odd_names_and_values_still_plot(tmp_path, replace):
    code, err = _cli(tmp_path, _job(replace), command="simulate")
    assert code in (0, 2), err
    if code == 0:
        from xo_fit.cli.app import main as run_main

        assert run_main(["simulate", str(tmp_path / "job.toml"), "--out", str(tmp_path / "p")]) == 0
        assert (tmp_path / "p" / "response.png").stat().st_size > 1000


def test_values_no_part_can_have_are_refused(tmp_path):
    code, err = _cli(tmp_path, _job({'value = "2R2"': "value = 5e-324"}))
    assert code == 2 and "is no part: values must lie within 1e-12 to 1e+12 ohm" in err, err


RESONANT = """
[grid]
f_min = 1000
f_max = 4000
points = 3
[driver.w]
response = 90
impedance = 8
[[part]]
name = "L1"
type = "L"
nodes = ["in", "a"]
value = 0.0006332573977646111
[[part]]
name = "C1"
type = "C"
nodes = ["a", "0"]
value = 1e-5
min = "5uF"
max = "10uF"
[[part]]
name = "W"
type = "driver"
driver = "w"
nodes = ["in", "0"]
[target.way.w]
type = "fullrange"
"""


@pytest.mark.parametrize("extra", ["", "[source]\nresistance = 0.01\n[cost]\nimpedance_min = 3.2\n"])
def test_an_exact_series_resonance_across_the_source_is_no_traceback(tmp_path, extra):
    """An ideal series LC across "in", resonant on a grid point (2 kHz: w^2 L C = 1 to the last bit): the nodal
    matrix is singular there (Rs = 0), or nearly (a small Rs, where the two solve paths' residues of the short
    once gave 198204 and 87954). Simulate and fit finish, the load reads as the short it is, and the cost
    reported is the cost the search computed (the fused kernel) for the same design, to 1e-9."""
    import json

    import xo_fit
    from xo_fit.search.fitting import cost_model
    from xo_fit.model.fused import FusedCost

    (tmp_path / "job.toml").write_text(RESONANT + extra)
    for command in ("simulate", "fit"):
        assert main([command, str(tmp_path / "job.toml"), "--out", str(tmp_path / command), "--no-plots"]
                    + (["--budget", "300"] if command == "fit" else [])) == 0
        doc = json.loads((tmp_path / command / "result.json").read_text())
        if command == "simulate":  # the hand design sits on the resonance (a fit with a floor moves off it)
            assert doc["metrics"]["impedance_min_ohm"] < 1e-6
            assert doc["metrics"]["impedance_min_hz"] == pytest.approx(2000)
        design = xo_fit.load_result(tmp_path / command)
        cm = cost_model(design.system)[0]
        searched = FusedCost(cm)(design.array[None])[0]
        assert abs(cm.evaluate(design.array[None]).cost[0] - doc["cost"]) <= 1e-9 * max(1.0, abs(doc["cost"]))
        assert np.isfinite(doc["cost"]) and abs(searched - doc["cost"]) <= 1e-9 * max(1.0, abs(doc["cost"]))
