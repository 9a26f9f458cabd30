"""A job over three serials on a station with a switch matrix and three DUTs: each unit's runs are
linked to the job, the matrix's audit log shows each channel change, and the source was off at every
change (never a hot switch), read from the order of the two instruments' audit logs."""

from __future__ import annotations

from benchctl.cli import main
from benchctl.exit_codes import EXIT_OK
from benchctl.simulated_instruments.bench import SimulatedBench
from benchctl.store import Store


def test_a_job_steps_the_switch_matrix_between_three_duts(tmp_path, capsys):
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, reading_time_s=0.002, duts=3).start()
    try:
        station = bench.write_station(tmp_path / "st.toml")
        (tmp_path / "params.toml").write_text("vin_v = [48.0]\nload_pct = [50.0, 100.0]\n")
        job = tmp_path / "night.toml"
        job.write_text('[job]\nname = "night"\ndut_part = "FB-48S05"\ndut_revision = "B"\n'
                       'dut_serials = ["U1", "U2", "U3"]\nswitch_channels = [3, 1, 2]\n'
                       '\n[[step]]\nprocedure = "efficiency_map"\nparams = "params.toml"\n')
        db = tmp_path / "night.db"
        code = main(["job", str(job), "--station", str(station), "--db", str(db)])
        out = capsys.readouterr().out
        assert code == EXIT_OK, out
        with Store.open(str(db)) as store:
            runs = store.runs().sort_values("run_id")
            assert runs["dut_serial"].tolist() == ["U1", "U2", "U3"]
            assert runs["job_id"].nunique() == 1 and runs["job_id"].notna().all()
        mux = bench.instruments["mux"].audit.entries()
        channels = [e for e in mux if e.kind == "state" and e.text == "channel"]
        # channel 1 at the bench's start is not in the log; then break before make for each unit, all open at the end
        assert [e.value for e in channels] == [0, 3, 0, 1, 0, 2, 0]
        assert not [e for e in mux if e.text == "hot_switch"]
        # the source's output changes, on the same clock (time.monotonic): off at every channel change
        src = [e for e in bench.instruments["source"].audit.entries() if e.kind == "state" and e.text == "output"]
        for change in channels:
            before = [e for e in src if e.seq is not None and e.t_s <= change.t_s]
            assert not before or before[-1].value is False, (change, before[-1:])
        # and each DUT was powered only while its channel was closed: each unit ran on its own DUT
        on_times = [e.t_s for e in src if e.value is True]
        assert len(on_times) == 3
        closes = [e for e in channels if e.value]
        for close, t_on, nxt in zip(closes, on_times, closes[1:] + [channels[-1]]):
            assert close.t_s < t_on < nxt.t_s
        for k, model in enumerate(bench.dut_models):   # every DUT saw its source on once (private history)
            assert any(seg.source.enabled for seg in model._segments), k
    finally:
        bench.stop()
