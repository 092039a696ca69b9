"""The console's screens fed fixed snapshots (made by the real engine): what the operator reads
and which requests each key sends. No daemon here: requests are recorded and then fail as they
would with no daemon attached. The end-to-end tests with the real daemon are in
test_console_e2e.py.
"""

from __future__ import annotations

from chargebook.acquire.session_meta import validate_metadata
from chargebook.tui.app import ConsoleApp
from chargebook.tui.messages import LinkStatus
from chargebook.tui.screens.dialogs import ConfirmScreen, ReasonScreen
from chargebook.tui.screens.environment import EnvironmentScreen
from chargebook.tui.screens.measure import MeasureScreen
from chargebook.tui.screens.setup import SetupScreen
from chargebook.tui.screens.summary import SummaryScreen
from chargebook.tui.widgets.fields import Field
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
    assert "   4   \u221219.4200  auto    !" in shown  # the spike, marked "!" not by colour
    assert "#4 ! This reading lies far from" in shown
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
        await pilot.click("#do-arm")  # not allowed while reviewing: the button is disabled
        await pilot.click("#do-accept")
        await pilot.pause()
    assert app.sent == [("set.accept", {})]


async def test_p_pauses_or_resumes_as_the_daemon_allows():
    paused = load_snapshot("collecting")
    paused["state"], paused["paused_from"] = "paused", "collecting"
    paused["allowed"] = ["environment.set", "session.resume", "session.stop", "session.abort"]
    app = ScreenHarness(MeasureScreen, paused)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        assert "p Resume" in screen_text(app)
        await pilot.press("p")
        await pilot.pause()
        app.console_screen.show(load_snapshot("collecting"), app.initial_link)
        await pilot.pause()
        assert "p Pause" in screen_text(app)
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
        assert "reason is empty" in app.screen.query_one(Field).problem
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
        # Plausible range 10-40 °C: common practice (docs/physics.md, "Plausible input ranges").
        assert temperature.problem == "temperature_C = 80 is outside the allowed range 10 to 40 °C"
        await pilot.press("enter")
        await pilot.pause()
        assert isinstance(app.screen, EnvironmentScreen)  # still open, the entry kept
        assert temperature.value == "80"
        assert "!! temperature_C = 80" in screen_text(app)
    assert app.sent == []


async def test_the_setup_form_checks_entries_as_typed_and_rechecks_when_the_unit_changes():
    app = ScreenHarness(lambda send: SetupScreen(send, setup_defaults()), load_snapshot("idle"))
    async with app.run_test(size=SIZE) as pilot:
        screen = app.console_screen
        k_Q = screen.query_one("#field-k_Q", Field)
        k_Q.input.value = "2"
        await pilot.pause()
        assert k_Q.problem.startswith("k_Q = 2 is outside the allowed range 0.8 to 1.2")
        pressure = screen.query_one("#field-pressure", Field)
        pressure.input.value = "101.3"  # typed in kPa while the unit still says hPa
        await pilot.pause()
        # 60-110 kPa is 600-1100 hPa: common practice range, 1 hPa = 0.1 kPa (docs/physics.md).
        assert (
            pressure.problem == "pressure_hPa = 101.3 is outside the allowed range 600 to 1100 hPa"
        )
        await pilot.press("ctrl+s")
        await pilot.pause()
        assert app.sent == []  # nothing is sent while an entry is wrong
        assert "correct the entries marked !!" in screen_text(app)
        screen.query_one("#choice-pressure_unit", Select).value = "kPa"
        await pilot.pause()
        assert pressure.problem == ""  # the same 101.3, now in kPa, is accepted


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
            if "Not connected" in screen_text(app):
                break
            await pilot.pause(0.05)
        shown = screen_text(app)
        await pilot.press("ctrl+q")
    assert shown.startswith("!! Not connected to the daemon — retrying…")
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
