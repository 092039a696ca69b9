"""The console's screens fed fixed snapshots (made by the real engine): what the operator reads
and which requests each key sends. No daemon here: requests are recorded and then fail as they
would with no daemon attached. The end-to-end tests with the real daemon are in
test_console_e2e.py.
"""

from __future__ import annotations

from chargebook.acquire.session.metadata import validate_metadata
from chargebook.tui.app import ConsoleApp
from chargebook.tui.messages import LinkStatus
from chargebook.tui.screens.dialogs import ConfirmScreen, ReasonScreen
from chargebook.tui.screens.environment import EnvironmentScreen
from chargebook.tui.screens.measure import MeasureScreen
from chargebook.tui.screens.setup import SetupScreen
from chargebook.tui.screens.summary import SummaryScreen
from chargebook.tui.widgets.action_bar import ActionBar
from chargebook.tui.widgets.fields import Field
from chargebook.tui.widgets.results_panel import ResultsPanel
from console_driver import until
from harness import ScreenHarness, load_snapshot
from screen_text import screen_text
from textual.widgets import Select

SIZE = (80, 24)


def setup_defaults() -> dict:
    """The details of the fixed finished session, as the console offers them for the next."""
    finished = load_snapshot("finished")
    return {**finished["session"]["metadata"], **finished["environment"]}


async def test_the_measure_view_says_flags_in_words_with_markers_at_80_by_24():
    app = ScreenHarness(MeasureScreen, load_snapshot("reviewing_spike"))
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        shown = screen_text(app)
    assert "Do now: The set is complete." in shown
    assert "Step 4 of 6 · Opposite polarity · \u2212300 V" in shown
    # The spike, marked "!" not by colour, and named the same way in the list, the reading's flag
    # and the set's flag: "3", the third reading used (after settling readings s1 and s2).
    assert "  s2   \u221218.6400  auto    settling" in shown
    assert "   3   \u221219.4200  auto    !" in shown
    assert "#3 ! This reading lies far from" in shown
    # Every reading of the set is in sight with the flags: the worst, then how many more.
    for label in ("s1", "s2", "1", "2", "3", "4"):
        assert (
            f"\n {label.rjust(3)}   \u221218." in shown
            or f"\n {label.rjust(3)}   \u221219." in shown
        )
    assert "+7 more flags: press 4" in shown
    assert "rel. SD 2.281 %" in shown  # as the daemon computed it
    assert "4 Flags (7 !)" in shown
    assert "k Accept" in shown and "r Redo" in shown  # the key help is on screen


async def test_a_key_sends_its_action_only_when_the_daemon_allows_it():
    app = ScreenHarness(MeasureScreen, load_snapshot("reviewing_spike"))
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("a", "c")  # arm and capture: not allowed while reviewing
        await pilot.pause()
        assert app.sent == []
        await pilot.press("k")
        await pilot.pause()
        assert app.sent == [("set.accept", {})]


async def test_the_mouse_does_what_the_keys_do_and_a_disabled_button_does_nothing():
    app = ScreenHarness(MeasureScreen, load_snapshot("reviewing_spike"))
    async with app.run_test(size=SIZE) as pilot:
        bar = app.screen.query_one(ActionBar)
        # (the bar's left padding: one cell)
        await pilot.click(ActionBar, offset=(bar.place_of("arm") + 2, 0))  # disabled: reviewing
        await pilot.click(ActionBar, offset=(bar.place_of("accept") + 2, 0))
        await pilot.pause()
    assert app.sent == [("set.accept", {})]


async def test_p_pauses_or_resumes_as_the_daemon_allows():
    paused = load_snapshot("collecting")
    paused["state"], paused["paused_from"] = "paused", "collecting"
    paused["allowed"] = ["environment.set", "session.resume", "session.stop", "session.abort"]
    app = ScreenHarness(MeasureScreen, paused)
    async with app.run_test(size=SIZE) as pilot:
        await until(pilot, lambda: "p Resume" in screen_text(app), "p Resume")
        await pilot.press("p")
        await pilot.pause()
        app.console_screen.show(load_snapshot("collecting"), app.initial_link)
        # The key bar is drawn on a later frame than the snapshot's arrival.
        await until(pilot, lambda: "p Pause" in screen_text(app), "p Pause")
        await pilot.press("p")
        await pilot.pause()
    assert app.sent == [("session.resume", {}), ("session.pause", {})]


async def test_redo_asks_for_a_reason_and_refuses_an_empty_one():
    app = ScreenHarness(MeasureScreen, load_snapshot("reviewing_spike"))
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("r")
        await pilot.pause()
        assert isinstance(app.screen, ReasonScreen)
        await pilot.press("enter")
        await pilot.pause()
        assert isinstance(app.screen, ReasonScreen)
        assert "Reason: enter a value" in app.screen.query_one(Field).problem
        await pilot.press(*"spike on 4", "enter")
        await pilot.pause()
        assert not isinstance(app.screen, ReasonScreen)
    assert app.sent == [("set.redo", {"reason": "spike on 4"})]


async def test_abort_needs_a_confirmation_and_backing_out_sends_nothing():
    app = ScreenHarness(MeasureScreen, load_snapshot("collecting"))
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("x")
        await pilot.pause()
        assert isinstance(app.screen, ConfirmScreen)
        assert "Everything recorded is kept" in screen_text(app)
        await pilot.press("escape")
        await pilot.pause()
        assert app.sent == []
        await pilot.press("x", *"beam fault", "enter")
        await pilot.pause()
    assert app.sent == [("session.abort", {"reason": "beam fault", "confirm": True})]


async def test_80_degrees_is_refused_as_typed_naming_the_field_and_nothing_is_sent():
    app = ScreenHarness(MeasureScreen, load_snapshot("collecting"))
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("t")
        await pilot.pause()
        assert isinstance(app.screen, EnvironmentScreen)
        temperature = app.screen.query_one("#field-temperature_C", Field)
        temperature.input.value = ""
        await pilot.press("8", "0")
        await pilot.pause()
        assert temperature.problem == ""  # not while typing: when it is left or submitted
        await pilot.press("enter")
        await pilot.pause()
        assert isinstance(app.screen, EnvironmentScreen)  # still open, the entry kept
        assert temperature.value == "80"
        # Plausible range 10-40 °C: common practice (docs/physics.md, 6.1 "Refused inputs"),
        # said with the entry's own label, not the daemon's parameter name.
        assert temperature.problem == "Air temperature °C: 80 is outside 10 to 40 °C"
        assert "!! Air temperature °C: 80 is outside" in screen_text(app)
        await pilot.press("backspace", "backspace", "2", "1")
        await pilot.pause()
        assert temperature.problem == ""  # fixed: the problem goes at once
    assert app.sent == []


async def test_the_setup_form_checks_entries_as_typed_and_rechecks_when_the_unit_changes():
    app = ScreenHarness(lambda send: SetupScreen(send, setup_defaults()), load_snapshot("idle"))
    async with app.run_test(size=SIZE) as pilot:
        screen = app.console_screen
        assert "!!" not in screen_text(app)  # nothing is wrong before anything is typed
        k_Q = screen.query_one("#field-k_Q", Field)
        k_Q.input.focus()
        k_Q.input.value = "2"
        await pilot.pause()
        await pilot.press("tab")  # leave the entry
        await pilot.pause()
        assert k_Q.problem == "k_Q: 2 is outside 0.8 to 1.2"
        pressure = screen.query_one("#field-pressure", Field)
        pressure.input.focus()
        pressure.input.value = "101.3"  # typed in kPa while the unit still says hPa
        await pilot.press("tab")
        await pilot.pause()
        # 60-110 kPa is 600-1100 hPa: common practice range, 1 hPa = 0.1 kPa (SI).
        assert pressure.problem == "Air pressure: 101.3 is outside 600 to 1100 hPa"
        await pilot.press("ctrl+s")
        await pilot.pause()
        assert app.sent == []  # nothing is sent while an entry is wrong
        assert "correct the entries marked !!" in screen_text(app)
        screen.query_one("#choice-pressure_unit", Select).value = "kPa"
        await pilot.pause()
        assert pressure.problem == ""  # the same 101.3, now in kPa, is accepted
        k_Q.input.value = "0.992"
        screen.query_one("#field-temperature_C", Field).input.value = "21.4"
        await pilot.pause()
        assert "correct the entries marked !!" not in screen_text(app)  # all right now: gone


async def test_the_setup_form_gives_metadata_the_daemons_own_check_accepts():
    app = ScreenHarness(lambda send: SetupScreen(send, setup_defaults()), load_snapshot("idle"))
    async with app.run_test(size=SIZE) as pilot:
        form = app.console_screen.form
        form.query_one("#field-chamber_serial", Field).input.value = "4417"
        form.query_one("#field-tolerance_pct", Field).input.value = "daily"
        form.query_one("#field-calibration_date", Field).input.value = "2024-11-05"
        await pilot.pause()
        metadata = form.metadata()
    assert metadata is not None
    assert metadata["chamber_serial"] == "4417"  # a serial number stays text
    assert metadata["N_Dw"] == setup_defaults()["N_Dw"] and metadata["N_Dw_unit"] == "Gy/nC"
    checked = validate_metadata(metadata)  # the daemon's own check of session.start
    assert checked.tolerance_pct == 3.0  # "daily": AAPM TG-142 output constancy, 3 %
    assert checked.calibration_date == "2024-11-05"


async def test_the_setup_form_starts_an_electron_session_the_daemon_accepts():
    app = ScreenHarness(lambda send: SetupScreen(send, setup_defaults()), load_snapshot("idle"))
    async with app.run_test(size=SIZE) as pilot:
        form = app.console_screen.form
        form.query_one("#field-beam", Field).input.value = "10 MeV"
        form.query_one("#choice-modality", Select).value = "electron"
        form.query_one("#choice-chamber_type", Select).value = "plane-parallel"
        R50 = form.query_one("#field-R50_cm", Field)
        R50.input.value = "42"  # typed in mm
        await pilot.pause()
        assert form.metadata() is None
        assert R50.problem == "R50 cm (electrons): 42 is outside 1 to 20 cm"
        R50.input.value = "4.2"
        form.query_one("#field-k_Q_source", Field).input.value = "own determination"
        await pilot.pause()
        metadata = form.metadata()
    assert metadata is not None
    checked = validate_metadata(metadata)  # the daemon's own check of session.start
    assert (checked.modality, checked.R50_cm, checked.chamber_type) == (
        "electron",
        4.2,
        "plane-parallel",
    )
    assert checked.k_Q_source == "own determination"


async def test_not_connected_and_instrument_lost_are_said_plainly():
    lost = load_snapshot("instrument_lost")
    app = ScreenHarness(
        MeasureScreen, lost, LinkStatus(False, "Not connected to the daemon — retrying…")
    )
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        assert screen_text(app).startswith(" !! Not connected to the daemon — retrying…")
        await pilot.press("a")
        await pilot.pause()
        assert app.sent == []  # nothing is allowed while the daemon is away
        app.console_screen.show(lost, LinkStatus(True, "Connected"))
        await pilot.pause()
        assert screen_text(app).startswith(
            " !! Electrometer DISCONNECTED: the electrometer stopped"
        )


async def test_the_summary_shows_results_history_and_the_safety_caution():
    snapshot = load_snapshot("finished")
    app = ScreenHarness(SummaryScreen, snapshot)
    async with app.run_test(size=(80, 60)) as pilot:
        await pilot.pause()
        shown = screen_text(app)
    assert "Session 1 finished" in shown
    assert f"{snapshot['results']['dose_per_MU_cGy']:.4f} cGy/MU" in shown
    assert "superseded: spike on" in shown
    assert "never replaces, the judgement of a qualified" in shown


async def test_words_from_the_daemon_and_the_operator_are_shown_exactly_as_written():
    snapshot = load_snapshot("finished")
    snapshot["sets"][3]["reason"] = "[b]cable[/b] moved [1]"  # brackets are not markup
    snapshot["results"]["flags"][0]["message"] = "leakage [high] in words"
    app = ScreenHarness(SummaryScreen, snapshot)
    async with app.run_test(size=(80, 70)) as pilot:
        await pilot.pause()
        shown = screen_text(app)
    assert "[b]cable[/b] moved" in shown
    assert "leakage [high] in words" in shown


async def test_with_no_daemon_yet_the_console_says_so_and_where_it_looks(tmp_path):
    socket_path = tmp_path / "no-daemon-here.sock"
    app = ConsoleApp(socket_path)
    async with app.run_test(size=SIZE) as pilot:
        for _ in range(100):
            if "No daemon answers" in screen_text(app):
                break
            await pilot.pause(0.05)
        shown = screen_text(app)
        await pilot.press("ctrl+q")
    assert shown.startswith("!! No daemon answers yet: attempt ")  # 1, or later under load
    assert "of 8 (no socket there); retrying…" in shown
    assert str(socket_path) in "".join(shown.split())  # however the long path wraps


async def test_results_the_daemon_could_not_compute_are_said_so_in_words():
    snapshot = load_snapshot("reviewing_spike")
    snapshot["results_error"] = "reduced_nC[1] = 0 averages zero"
    app = ScreenHarness(MeasureScreen, snapshot)
    async with app.run_test(size=(120, 30)) as pilot:  # wide enough for the line not to wrap
        await pilot.pause()
        shown = screen_text(app)
    assert "!! Results not computed: reduced_nC[1] = 0 averages zero" in shown


async def test_the_setup_form_shows_the_safety_caution_beside_start():
    app = ScreenHarness(lambda send: SetupScreen(send, setup_defaults()), load_snapshot("idle"))
    async with app.run_test(size=(80, 80)) as pilot:
        await pilot.pause()
        shown = screen_text(app)
    assert "never replaces, the judgement of a qualified" in shown
    assert shown.index("Caution:") < shown.index("Start session (Ctrl+S)")


async def test_while_not_connected_every_instruction_says_do_not_deliver_beam():
    collecting = load_snapshot("collecting")
    app = ScreenHarness(MeasureScreen, collecting)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        assert "Deliver" in screen_text(app)  # the daemon's instruction while connected
        app.console_screen.show(collecting, LinkStatus(False, "Not connected to the daemon"))
        await pilot.pause()
        shown = screen_text(app)
        assert "Do now: NOT CONNECTED: do not deliver beam" in shown
        assert "Deliver" not in shown  # the stale instruction is gone, not shown beside it
        app.console_screen.show(collecting, LinkStatus(True, "Connected"))
        await pilot.pause()
        assert "NOT CONNECTED" not in screen_text(app)


async def test_every_main_screen_keeps_a_one_line_caution_in_view_at_80_by_24():
    screens = (
        (lambda send: SetupScreen(send, setup_defaults()), "idle"),
        (MeasureScreen, "collecting"),
        (MeasureScreen, "reviewing_spike"),
        (SummaryScreen, "finished"),
    )
    for make_screen, fixture in screens:
        app = ScreenHarness(make_screen, load_snapshot(fixture))
        async with app.run_test(size=SIZE) as pilot:
            await pilot.pause()
            shown = screen_text(app)
        # The short line, or on the summary the whole caution, in view without scrolling.
        assert "qualified medical physicist" in " ".join(shown.split()), fixture


def test_closing_the_demo_says_where_an_open_session_is_kept_and_how_to_resume_it():
    from chargebook.tui.app import closing_words

    words = closing_words(
        load_snapshot("collecting"), "/run/x.sock", demo_database="/d/demo.sqlite"
    )
    assert "session 1 still open" in words and "kept in /d/demo.sqlite" in words
    assert "`chargebook demo` resumes it" in words
    finished = closing_words(load_snapshot("finished"), "/run/x.sock")
    assert finished.startswith("Console closed. The daemon at /run/x.sock goes on running.")
    assert "chargebook console --socket /run/x.sock" in finished


async def test_the_flags_tab_names_readings_as_the_list_does_and_puts_the_worst_first():
    app = ScreenHarness(MeasureScreen, load_snapshot("reviewing_spike"))
    async with app.run_test(size=(120, 60)) as pilot:
        await pilot.press("4")
        await pilot.pause()
        words = " ".join(screen_text(app).split())
    assert "#3 ! This reading lies far from" in words
    assert "reading(s) 3 stand apart" in words  # the set's own flag names the same number
    this_set = words[words.index("This set") : words.index("Session:")]
    markers = [word for word in this_set.split() if word in ("!!", "!", "i")]
    assert markers == sorted(markers, key=["!!", "!", "i"].index)  # worst first


async def test_a_pressure_in_hpa_and_an_n_dw_in_gy_per_c_show_what_the_daemon_will_use():
    app = ScreenHarness(lambda send: SetupScreen(send, {}), load_snapshot("idle"))
    async with app.run_test(size=(80, 60)) as pilot:
        screen = app.console_screen
        screen.query_one("#choice-pressure_unit", Select).value = "hPa"
        screen.query_one("#field-pressure", Field).input.value = "1012"
        screen.query_one("#choice-N_Dw_unit", Select).value = "Gy/C"
        screen.query_one("#field-N_Dw", Field).input.value = "5.04e7"

        # Each change is drawn once its events have gone round (more than one pause when loaded).
        def words() -> str:
            return " ".join(screen_text(app).split())

        await until(pilot, lambda: "(converted from 5.04e7 Gy/C)" in words(), "the N_D,w")
        await until(pilot, lambda: "(converted from 1012 hPa)" in words(), "the pressure")
        shown = words()
    # 1 hPa = 0.1 kPa; 1 Gy/C = 1e-9 Gy/nC (SI prefixes).
    assert "= 101.200 kPa (converted from 1012 hPa)" in shown
    assert "= 0.050400 Gy/nC (converted from 5.04e7 Gy/C)" in shown


async def test_the_results_panel_shows_leakage_boag_and_the_air_of_each_set():
    # Results as the daemon computes them (corrections.evaluate), with the temperature changed
    # between the routine and the opposite set; the panel shows what it is sent, nothing more.
    from chargebook.corrections.evaluate import MeasurementInputs, evaluate
    from chargebook.corrections.set_air import SetEnvironment

    snapshot = load_snapshot("reviewing_spike")
    first, second = SetEnvironment(21.4, 101.2, "entry 1", 1), SetEnvironment(21.8, 101.2, "", 2)
    snapshot["results"] = evaluate(
        MeasurementInputs(
            temperature_C=21.8,
            pressure_kPa=101.2,
            routine_bias_V=300.0,
            reduced_bias_V=100.0,
            routine_nC=(18.531, 18.528, 18.534),
            opposite_nC=(-18.566, -18.561, -18.569),
            reduced_nC=(18.392, 18.390, 18.395),
            leakage_nC=0.004,
            set_environments={"routine": first, "opposite": second, "reduced": second},
        )
    ).to_dict()
    stamp = {"recorded_at": "2025-03-14T09:30:00+00:00", "source": "console"}
    snapshot["environment_entries"] = [
        stamp,
        {"recorded_at": "2025-03-14T09:41:12+00:00", "source": "bench thermometer"},
    ]
    app = ScreenHarness(MeasureScreen, snapshot)
    async with app.run_test(size=(160, 60)) as pilot:
        await pilot.pause()
        shown = " ".join(screen_text(app).split())
    assert "Leakage 0.022 % of M, not subtracted" in shown
    assert "k_s by Boag" in shown
    # each entry with its source and its local time (the console's tests run in UTC)
    assert "Air, routine 21.40 °C, 101.200 kPa (entry 1, console, 09:30:00 +00:00)" in shown
    assert (
        "Air, opposite 21.80 °C, 101.200 kPa (entry 2, bench thermometer, 09:41:12 +00:00)" in shown
    )


async def test_the_results_panel_of_an_electron_beam_shows_R50_and_z_ref():
    # Results as the daemon computes them; z_ref = 0.6 R50 − 0.1 cm (IAEA TRS-398 (2000) and
    # AAPM TG-51 (1999), electron beams): 0.6 × 4.2 − 0.1 = 2.42 cm.
    from chargebook.corrections.beam_quality import BeamQuality
    from chargebook.corrections.evaluate import MeasurementInputs, evaluate

    snapshot = load_snapshot("reviewing_spike")
    quality = BeamQuality("electron", 4.2, "plane-parallel", "own determination")
    snapshot["results"] = evaluate(
        MeasurementInputs(routine_nC=(12.831, 12.834), k_Q=0.91, quality=quality)
    ).to_dict()
    app = ScreenHarness(MeasureScreen, snapshot)
    async with app.run_test(size=(160, 60)) as pilot:
        await pilot.pause()
        shown = " ".join(screen_text(app).split())
    assert "Electron beam R50 = 4.2 cm, z_ref = 2.42 cm" in shown


async def test_a_discarded_reading_is_said_in_words_above_the_instruction():
    paused = load_snapshot("collecting")
    paused["notice"] = (
        "The reading in progress (+12.3000 nC so far) was discarded because the session was "
        "paused: it is not recorded as a reading. Deliver that beam again."
    )
    app = ScreenHarness(MeasureScreen, paused)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        words = " ".join(screen_text(app).split())
    assert "!! The reading in progress (+12.3000 nC so far) was discarded" in words
    assert words.index("was discarded") < words.index("Do now:")


def reviewing_last_step() -> dict:
    """The finished session's snapshot, as it was while its last set was being reviewed."""
    snapshot = load_snapshot("finished")
    snapshot["state"], snapshot["step_index"] = "reviewing", len(snapshot["plan"]) - 1
    return snapshot


async def test_every_result_can_be_reached_by_keyboard_at_80_by_24():
    app = ScreenHarness(MeasureScreen, reviewing_last_step())
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        first = screen_text(app)
        # The answer first: dose, deviation (three lines when outside tolerance) and u_c are in
        # sight at 80 x 24; the factors and the session's flags are below the panel's edge.
        assert "Uncertainty u_c" in first and "Deviation" in first
        assert "Session flags" not in first
        for _ in range(12):  # Tab moves the focus until it reaches the results
            if isinstance(app.focused, ResultsPanel):
                break
            await pilot.press("tab")
        assert isinstance(app.focused, ResultsPanel)
        seen = screen_text(app)
        for _ in range(30):  # then the arrow key takes the operator down every line
            await pilot.press("down")
            await pilot.pause()
            seen += screen_text(app)
    assert "k_Q,Q0" in seen and "Session flags" in seen
    assert "No k_elec entered" in seen  # the last flag, at the very bottom


async def test_the_step_heading_wraps_rather_than_cutting_the_mu():
    app = ScreenHarness(MeasureScreen, reviewing_last_step())
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        shown = screen_text(app)
    assert "Step 6 of 6 · Return-to-start check · +300 V · 3 × 100" in shown
    assert "MU · optional" in shown and "…" not in shown  # on the next line, nothing cut


async def test_a_new_session_asks_for_the_air_again_or_a_confirmation_of_the_last_entry():
    app = ScreenHarness(lambda send: SetupScreen(send, setup_defaults()), load_snapshot("idle"))
    async with app.run_test(size=(80, 60)) as pilot:
        screen = app.console_screen
        await pilot.pause()
        words = " ".join(screen_text(app).split())
        assert "Last entry: 21.4 °C, 1012 hPa, at 2025-03-14 09:30:00 +00:00 (console)" in words
        assert screen.environment.params() is None  # not carried over without a word
        await pilot.press("ctrl+l")
        await pilot.pause()
        params = screen.environment.params()
        source = screen.environment.source()
    assert params == {
        "temperature_C": 21.4,
        "pressure": 1012.0,
        "pressure_unit": "hPa",
        "humidity_pct": 45.0,
    }
    assert (
        source
        == "typed at the console: the entry of 2025-03-14 09:30:00 +00:00 confirmed by the operator"
    )


async def test_the_focused_entry_is_marked_in_text_not_only_by_a_shade():
    app = ScreenHarness(lambda send: SetupScreen(send, {}), load_snapshot("idle"))
    async with app.run_test(size=SIZE) as pilot:
        app.console_screen.query_one("#field-operator", Field).input.focus()
        await pilot.pause()
        assert "▸ Operator" in screen_text(app)
        await pilot.press("tab")
        await pilot.pause()
        shown = screen_text(app)
    assert "▸ Operator" not in shown and "▸ Treatment machine" in shown


async def test_the_setup_form_takes_the_certificates_k_and_your_own_uncertainty_components():
    app = ScreenHarness(lambda send: SetupScreen(send, setup_defaults()), load_snapshot("idle"))
    async with app.run_test(size=SIZE) as pilot:
        form = app.console_screen.form
        entries = {
            "k_N_Dw": "2.2",
            "u_reference_conditions_pct": "0.3",
            "u_long_term_stability_pct": "0.2",
            "u_beam_monitor_pct": "0.1",
            "u_electrometer_resolution_pct": "0.05",
        }
        for key, typed in entries.items():
            form.query_one(f"#field-{key}", Field).input.value = typed
        await pilot.pause()
        metadata = form.metadata()
    assert metadata is not None
    checked = validate_metadata(metadata)  # the daemon's own check of session.start
    assert checked.k_N_Dw == 2.2 and checked.u_reference_conditions_pct == 0.3
    assert checked.u_long_term_stability_pct == 0.2 and checked.u_beam_monitor_pct == 0.1
    assert checked.u_electrometer_resolution_pct == 0.05


async def test_a_delta_that_changes_only_the_set_in_progress_redraws_no_hidden_tab(
    monkeypatch,
):
    from chargebook.acquire.protocol import apply_delta, snapshot_delta
    from chargebook.tui import snapshot_view
    from chargebook.tui.widgets import plan_view

    before = load_snapshot("collecting")
    current = before["current_set"]
    reading = {**current["readings"][-1], "id": 999, "seq": len(current["readings"]) + 1}
    grown = {**current, "readings": [*current["readings"], reading]}
    after = {**before, "seq": before["seq"] + 1, "current_set": grown}
    after["sets"] = [grown if entry["id"] == grown["id"] else entry for entry in before["sets"]]
    drawn = {"history": 0, "plan": 0}
    history_rows, plan_table = snapshot_view.history_rows, plan_view.plan_table

    def counted(name, draw):  # counts, changes nothing
        def run(*args):
            drawn[name] += 1
            return draw(*args)

        return run

    monkeypatch.setattr(snapshot_view, "history_rows", counted("history", history_rows))
    monkeypatch.setattr(plan_view, "plan_table", counted("plan", plan_table))
    app = ScreenHarness(MeasureScreen, before)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("3")  # the plan tab, so the plan is drawn
        await pilot.pause()
        assert drawn == {"history": 0, "plan": 1}  # the history's tab is hidden
        screen = app.screen
        screen.show(apply_delta(before, snapshot_delta(before, after)), screen.link)
        await pilot.pause()
        assert drawn == {"history": 0, "plan": 1}  # the plan did not change
        await pilot.press("2")  # the history's tab: drawn as it is shown, with the grown set
        await pilot.pause()
        assert drawn == {"history": 1, "plan": 1}
        shown = apply_delta(screen.snapshot, snapshot_delta(screen.snapshot, after | {"seq": 99}))
        screen.show(shown, screen.link)
        await pilot.pause()
        assert drawn == {"history": 1, "plan": 1}  # nothing of them changed: not drawn again


async def test_a_screen_being_taken_down_ignores_a_late_snapshot():
    from chargebook.tui.widgets.status_line import StatusLine

    app = ScreenHarness(MeasureScreen, load_snapshot("collecting"))
    async with app.run_test(size=SIZE) as pilot:
        screen = app.screen
        await screen.query_one(StatusLine).remove()  # as when the app switches screens
        screen.show(load_snapshot("reviewing_spike"), screen.link)  # raised NoMatches
        await pilot.pause()
        assert screen.snapshot == load_snapshot("reviewing_spike")


def _with_readings(before: dict, charges_nC: list[float], needed: int) -> dict:
    """Return ``before`` (a collecting snapshot) whose set in progress has these readings more
    (the fixture's invented charges continued, for the shape only) and needs ``needed``."""
    current = before["current_set"]
    held = current["readings"]
    added = [
        {**held[-1], "id": 1000 + n, "seq": len(held) + n, "label": str(len(held) + n - 1)}
        | {"charge_nC": charge_nC}
        for n, charge_nC in enumerate(charges_nC, start=1)
    ]
    done = current["readings_done"] + len(added)
    grown = {**current, "readings": [*held, *added], "readings_done": done}
    grown["readings_needed"] = needed
    after = {**before, "seq": before["seq"] + len(added), "current_set": grown}
    after["sets"] = [grown if entry["id"] == grown["id"] else entry for entry in before["sets"]]
    return after


async def test_a_new_reading_takes_its_line_in_the_set_panel_and_stays_in_sight():
    from chargebook.acquire.protocol import apply_delta, snapshot_delta
    from chargebook.tui.widgets.reading_set import ReadingSetPanel

    before = _with_readings(load_snapshot("collecting"), [], needed=12)
    app = ScreenHarness(MeasureScreen, before)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        panel = app.screen.query_one(ReadingSetPanel)
        height = len(panel.lines)
        assert panel.rows == 3  # the settling reading and two readings
        held = before
        for count in range(3, 13):  # readings 3 to 12 arrive one by one
            after = _with_readings(held, [18.53 + 0.0001 * count], needed=12)
            app.screen.show(apply_delta(held, snapshot_delta(held, after)), app.screen.link)
            held = after
            await pilot.pause()
            assert len(panel.lines) == height  # the same lines: no new layout for a reading
            shown = screen_text(app)
            assert f"  {count}    {18.53 + 0.0001 * count:.4f}  auto" in shown  # in sight
        assert panel.rows == 13
        assert "12 of 12 readings (+1 settling)" in " ".join(shown.split())


async def test_the_flags_tab_is_drawn_when_shown_not_at_every_reading(monkeypatch):
    from chargebook.tui.widgets import flag_list

    drawn: list[str] = []
    flag_text = flag_list.flag_text

    def counted(*args):  # counts, changes nothing
        drawn.append(text := flag_text(*args))
        return text

    monkeypatch.setattr(flag_list, "flag_text", counted)
    before = load_snapshot("collecting")
    app = ScreenHarness(MeasureScreen, before)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        for count in (3, 4):
            app.screen.show(
                _with_readings(before, [18.53] * (count - 2), needed=4), app.screen.link
            )
            await pilot.pause()
        assert drawn == []  # the flags tab is hidden
        await pilot.press("4")
        await pilot.pause()
        assert len(drawn) == 1 and "The routine set has 2 readings" in drawn[0]
        assert "The routine set has 2 readings" in " ".join(screen_text(app).split())
