"""``benchctl probe``: its decisions without sockets, then each quirk found through real sockets.

The expected behaviour of a textbook instrument is IEEE 488.2-1992 (§10 common commands,
§11 status registers, §12.5.3 *OPC? answers the character 1; from memory) and SCPI-1999
Vol. 2 §21.8 (SYST:ERR? answers <code>,"<text>"; from memory). Each quirk of
:mod:`benchctl.simulated_instruments.scpi.quirks` departs from one of them on purpose.
"""

from __future__ import annotations

import json
import tomllib

import pytest

from benchctl.cli import main
from benchctl.commands.probe import (Exchange, Observations, compound_result, decide, fragment, is_error_entry,
                                     is_one, is_register, probe, proposed_timeout_s)
from benchctl.drivers.scpi_driver import ScpiDriver
from benchctl.exit_codes import EXIT_BAD_INPUT, EXIT_INSTRUMENT, EXIT_OK
from benchctl.simulated_instruments.bench import SimulatedBench

IDN = "benchctl-sim,sim dc source,S0001,1.0"
PROBE_TIMEOUT_S = 1.0  # per exchange while probing; a missing answer costs this much once


# ------------------------------------------------------------------------------ pure decisions
def _obs(**answers) -> Observations:
    base = {"idn": IDN + "\n", "esr": "0", "stb": "0", "opc": "1", "syst_err": '0,"No error"',
            "esr_after_syst_err": "0", "compound": "0;" + IDN}
    base.update(answers)
    exchanges = tuple(Exchange(k, k, v) for k, v in base.items() if v != "skip")
    return Observations("TCPIP::127.0.0.1::5025::SOCKET", True, write_termination="\n", read_termination="\n",
                        exchanges=exchanges + (Exchange("cls", "*CLS", ""),), latencies_s=(0.001, 0.002, 0.0015))


def test_answer_forms():
    # *OPC? forms of 1 seen on real instruments (common practice), all equal to 1 as numbers
    assert all(is_one(a) for a in ("1", "+1", "1.0", "+1.000E+00", "1\r"))
    assert not any(is_one(a) for a in ("0", "", None, "ON", "10"))
    assert is_register("32") and is_register("+0") and not is_register("256") and not is_register("1.5")
    assert is_error_entry('-113,"Undefined header"') and is_error_entry('+0,"No error"')
    assert not is_error_entry("0") and not is_error_entry(None)
    assert compound_result("0;" + IDN, IDN) == "both"
    assert compound_result("32", IDN) == "first_only"
    assert compound_result(None, IDN) == "none"


def test_timeout_rule():
    assert proposed_timeout_s((0.001, 0.002, 0.003)) == 2.0  # the floor
    assert proposed_timeout_s((0.30, 0.31, 0.30)) == 3.0  # 10 x median
    assert proposed_timeout_s((0.05, 0.05, 1.0)) == 3.0  # 3 x the slowest
    assert proposed_timeout_s(()) is None


@pytest.mark.parametrize("answers, expected", [
    ({}, {"error_check": "compound", "completion": "opc_query", "read_termination": "\n"}),
    ({"idn": IDN + "\r"}, {"read_termination": "\r\n"}),
    ({"opc": "+1"}, {"completion": "opc_query"}),
    ({"syst_err": None, "esr_after_syst_err": "32"}, {"error_check": "status_byte"}),
    ({"compound": "32"}, {"error_check": "separate"}),
    ({"syst_err": None, "stb": None}, {"error_check": "none"}),
    ({"opc": None}, {"completion": "esr_poll"}),
    ({"opc": None, "esr": None}, {"completion": "fixed_wait", "completion_wait_s": 1.0}),
])
def test_decisions(answers, expected):
    proposal = decide(_obs(**answers))
    assert proposal.usable
    for key, value in expected.items():
        assert proposal.options[key] == value, key
    if expected.get("error_check") == "none" or expected.get("completion") == "fixed_wait":
        assert proposal.cautions


def test_no_answer_is_not_usable_and_names_why():
    proposal = decide(Observations("TCPIP::127.0.0.1::1::SOCKET", True, exchanges=(Exchange("idn", "*IDN?", None),)))
    assert not proposal.usable and "answered nothing" in proposal.cautions[0]
    proposal = decide(Observations("TCPIP::127.0.0.1::1::SOCKET", False, "VisaIOError: refused"))
    assert not proposal.usable and "refused" in proposal.cautions[0]


def test_fragment_is_valid_toml_with_the_contract_names():
    text = fragment(decide(_obs(idn=IDN + "\r")), role="source", driver="dc_source", visa_library="@py")
    table = tomllib.loads(text)["instruments"]["source"]
    assert table["driver"] == "dc_source" and table["visa_library"] == "@py" and table["timeout_s"] == 2.0
    assert table["options"] == {"read_termination": "\r\n", "write_termination": "\n", "error_check": "compound",
                                "completion": "opc_query"}


# ----------------------------------------------------------------------- quirks through sockets
QUIRK_CASES = {
    # quirk: (simulated quirk list, options the probe must propose, the finding that must say "no")
    "crlf": (["crlf"], {"read_termination": "\r\n", "error_check": "compound", "completion": "opc_query"}, None),
    "opc_plus_one": (["opc_plus_one"], {"read_termination": "\n", "completion": "opc_query"}, None),
    "no_syst_err": (["no_syst_err"], {"error_check": "status_byte", "completion": "opc_query"}, "SYST:ERR?"),
    "no_compound": (["no_compound"], {"error_check": "separate"}, "compound"),
    "slow": (["slow:0.3"], {"error_check": "compound", "completion": "opc_query"}, None),
}


@pytest.fixture
def quirky_bench():
    started = []

    def start(quirk_list, protocol="socket"):
        bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, quirks={"source": quirk_list},
                               protocol=protocol, reading_time_s=0.002).start()
        started.append(bench)
        return bench

    yield start
    for bench in started:
        bench.stop()


@pytest.mark.parametrize("quirk", list(QUIRK_CASES))
def test_probe_finds_each_quirk(quirky_bench, quirk):
    quirk_list, expected, refused = QUIRK_CASES[quirk]
    bench = quirky_bench(quirk_list)
    proposal = probe(bench.resources["source"], timeout_s=PROBE_TIMEOUT_S)
    assert proposal.usable and proposal.identity.startswith("benchctl-sim,sim dc source,")
    for key, value in expected.items():
        assert proposal.options[key] == value, (quirk, key, proposal.options)
    no = {f.check for f in proposal.findings if f.works is False}
    assert no == ({refused} if refused else set()), (quirk, proposal.findings)
    if quirk == "opc_plus_one":
        opc = next(f for f in proposal.findings if f.check == "*OPC?")
        assert opc.answer == "+1" and "+1" in opc.note
    if quirk == "slow":
        # The answers take 0.3 s (the quirk's own delay, the truth), so 10 x that is proposed, >= 3 s.
        assert proposal.timeout_s >= 3.0
    else:
        assert proposal.timeout_s >= 2.0
    # The probe leaves the error queue empty (its last *CLS).
    assert bench.instruments["source"].queued_errors() == ()


def test_probe_over_hislip_with_crlf(quirky_bench):
    bench = quirky_bench(["crlf"], protocol="hislip")
    proposal = probe(bench.resources["source"], timeout_s=PROBE_TIMEOUT_S)
    assert proposal.options["read_termination"] == "\r\n" and proposal.options["error_check"] == "compound"


def test_cli_json_out_and_exit_codes(quirky_bench, tmp_path, capsys):
    bench = quirky_bench(["no_compound", "crlf"])
    out = tmp_path / "source.toml"
    code = main(["probe", bench.resources["source"], "--timeout-s", str(PROBE_TIMEOUT_S), "--json", "--role", "source",
                 "--driver", "dc_source", "--out", str(out)])
    assert code == EXIT_OK
    report = json.loads(capsys.readouterr().out)
    assert report["options"]["error_check"] == "separate" and report["options"]["read_termination"] == "\r\n"
    assert tomllib.loads(out.read_text())["instruments"]["source"]["options"] == report["options"]
    # the table form prints the fragment
    assert main(["probe", bench.resources["source"], "--timeout-s", str(PROBE_TIMEOUT_S)]) == EXIT_OK
    printed = capsys.readouterr().out
    assert "[instruments.instrument.options]" in printed and 'error_check = "separate"' in printed
    # bad input, and an instrument that is not there
    assert main(["probe", "not a resource"]) == EXIT_BAD_INPUT
    assert main(["probe", bench.resources["source"], "--timeout-s", "0"]) == EXIT_BAD_INPUT
    bench.stop()
    assert main(["probe", bench.resources["source"], "--timeout-s", "0.5"]) == EXIT_INSTRUMENT


def test_sim_quirk_option_is_parsed(capsys):
    assert main(["sim", "--quirk", "source:crlf,nonsense"]) == EXIT_BAD_INPUT
    assert "unknown quirk" in capsys.readouterr().err
    assert main(["sim", "--quirk", "nowhere:crlf"]) == EXIT_BAD_INPUT
    assert main(["sim", "--hislip", "nowhere"]) == EXIT_BAD_INPUT


# ------------------------------------------------------- e2e: the proposed table runs a procedure
DRIVER_OPTIONS = "error_check" in ScpiDriver.OPTIONS
needs_driver_options = pytest.mark.skipif(
    not DRIVER_OPTIONS,
    reason="needs the transport work's station options (read_termination, error_check, completion ... in "
           "ScpiDriver.OPTIONS); this branch's driver refuses them as unknown")
EFFICIENCY_TOL = 0.0015  # 0.15 %-points per loaded point, as tests/test_efficiency_truth.py


def _station_with(bench, role: str, text: str, path):
    """The bench's station file with ``role``'s table replaced by the probe's fragment."""
    proposed = tomllib.loads(text)["instruments"][role]
    lines = bench.station_toml().splitlines()
    start = lines.index(f"[instruments.{role}]")
    for k in range(start + 1, len(lines)):
        if lines[k].startswith("timeout_s"):
            lines[k] = f"timeout_s = {proposed['timeout_s']!r}"
            break
    lines += ["", f"[instruments.{role}.options]"]
    lines += [f"{key} = {json.dumps(value)}" for key, value in proposed["options"].items()]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    from benchctl.station import load_station

    return load_station(path)


@needs_driver_options
@pytest.mark.parametrize("quirk", list(QUIRK_CASES))
def test_proposed_options_run_a_procedure(quirky_bench, quirk, tmp_path, benchctl_store):
    from benchctl.procedure import load_procedure
    from benchctl.runner import execute

    bench = quirky_bench(QUIRK_CASES[quirk][0])
    proposal = probe(bench.resources["source"], timeout_s=PROBE_TIMEOUT_S)
    station = _station_with(bench, "source", fragment(proposal, role="source", driver="dc_source"),
                            tmp_path / "station.toml")
    emap = load_procedure("efficiency_map")
    d = bench.design
    truths = {}

    def progress(done, total, last):
        if last and "plan_index" in last and int(last["plan_index"]) not in truths:
            truths[int(last["plan_index"])] = bench.model.steady_state(
                bench.model.terminals().input_v, "CC", last["iout_set_a"], was_running=True)

    params = emap.resolve_parameters(values={**bench.procedure_parameters(), "vin_v": [d.vin_nom_v],
                                             "load_pct": [50, 100]})
    outcome = execute(emap, params, station, benchctl_store, progress=progress)
    assert outcome.status == "completed", outcome.message
    points = benchctl_store.points(outcome.run_id)
    assert len(points) == 2
    for _, row in points.iterrows():
        truth = truths[int(row["plan_index"])]
        err = row["pout_w"] / row["pin_w"] - truth.pout_w / truth.pin_w
        assert abs(err) <= EFFICIENCY_TOL, f"{quirk}: efficiency off by {err * 100:+.3f} %-points"
    assert bench.instruments["source"].audit.states("output")[-1].value is False
