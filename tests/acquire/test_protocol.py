"""The control protocol's contract: JSON-RPC 2.0 messages (jsonrpc.org/specification), the
parameters of each method declared as data, and where the socket lives."""

from __future__ import annotations

import json
import os

import pytest
from chargebook.acquire import protocol
from chargebook.acquire.engine.states import ACTION_STATES
from chargebook.acquire.protocol import Method, ParamsError, validate_params


def test_every_method_is_declared_and_every_operator_action_has_legal_states():
    assert set(protocol.METHODS) == {m.value for m in Method}
    assert set(protocol.OPERATOR_ACTIONS) == set(ACTION_STATES)


def test_error_codes_are_the_json_rpc_ones_and_application_codes_stay_out_of_the_reserved_range():
    # JSON-RPC 2.0 specification, section 5.1 "Error object".
    assert (protocol.PARSE_ERROR, protocol.INVALID_REQUEST) == (-32700, -32600)
    assert (protocol.METHOD_NOT_FOUND, protocol.INVALID_PARAMS) == (-32601, -32602)
    assert protocol.INTERNAL_ERROR == -32603
    application = [
        protocol.ILLEGAL_TRANSITION,
        protocol.INPUT_ERROR,
        protocol.INSTRUMENT_ERROR,
        protocol.CONFIRMATION_REQUIRED,
    ]
    # -32000 to -32099 is reserved for implementation-defined server errors.
    assert all(-32099 <= code <= -32000 for code in application)
    assert len(set(application)) == len(application)


@pytest.mark.parametrize(
    ("method", "params", "field", "allowed"),
    [
        ("environment.set", {"temperature_C": "warm", "pressure": 101}, "temperature_C", "number"),
        ("environment.set", {"temperature_C": True, "pressure": 101.3}, "temperature_C", "number"),
        ("environment.set", {"temperature_C": 21.0}, "pressure", "required"),
        ("environment.set", {"temperature_C": 21, "pressure": 1, "pressure_unit": "psi"},
         "pressure_unit", "kPa, hPa, mmHg"),
        ("environment.set", {"temperature_C": 21, "pressure": 101, "colour": "red"}, "colour",
         "one of"),
        ("set.redo", {}, "reason", "required"),
        ("session.abort", {"reason": "x", "confirm": "yes"}, "confirm", "true or false"),
        ("session.start", {"metadata": []}, "metadata", "object"),
        ("status", [1, 2], "params", "named parameters"),
    ],
)  # fmt: skip
def test_bad_params_name_the_field_and_what_is_allowed(method, params, field, allowed):
    with pytest.raises(ParamsError) as refused:
        validate_params(method, params)
    assert refused.value.field == field
    assert allowed in refused.value.allowed
    data = refused.value.data()
    assert data["field"] == field and json.dumps(data)


def test_good_params_pass_through_and_none_means_no_params():
    params = {"temperature_C": 21, "pressure": 1013.2, "pressure_unit": "hPa"}
    assert validate_params("environment.set", params) == params
    assert validate_params("status", None) == {}
    assert validate_params("step.manual_done", {"note": None}) == {"note": None}


def test_messages_are_json_rpc_2_lines_and_never_over_the_bound():
    line = protocol.encode(protocol.request(7, "status"))
    assert line.endswith(b"\n") and line.count(b"\n") == 1
    assert json.loads(line) == {"jsonrpc": "2.0", "id": 7, "method": "status"}
    error = protocol.error_response(7, protocol.INPUT_ERROR, "bad", {"field": "f"})
    assert error["error"] == {"code": -32002, "message": "bad", "data": {"field": "f"}}
    assert "id" not in protocol.notification("snapshot", {})
    with pytest.raises(ValueError, match="limit"):
        protocol.encode(protocol.notification("event", {"text": "x" * protocol.MAX_MESSAGE_BYTES}))
    with pytest.raises(ValueError):
        protocol.encode(protocol.result_response(1, float("nan")))  # NaN is not JSON


def test_the_default_socket_lives_in_the_runtime_dir_or_a_per_user_temp_dir(monkeypatch, tmp_path):
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(tmp_path))
    assert protocol.default_socket_path() == tmp_path / "chargebook" / "daemon.sock"
    monkeypatch.delenv("XDG_RUNTIME_DIR")
    fallback = protocol.default_socket_dir()
    assert fallback.name == f"chargebook-{os.getuid()}"


def _set(set_id: int, status: str, charges_nC: tuple[float, ...]) -> dict:
    readings = [{"id": 10 * set_id + i, "charge_nC": q} for i, q in enumerate(charges_nC)]
    return {"id": set_id, "status": status, "readings": readings}


def _snapshot(seq: int, sets: list[dict], state: str = "collecting") -> dict:
    return {"seq": seq, "state": state, "sets": sets, "results": {"k_TP": 1.0093}}


def test_a_delta_carries_only_what_changed_and_rebuilds_the_next_snapshot():
    # invented readings, for the shape of the message only
    old_sets = [_set(i, "superseded", (20.01, 20.02)) for i in range(1, 500)]
    old = _snapshot(7, [*old_sets, _set(500, "collecting", (20.03,))])
    new = _snapshot(9, [*[dict(s) for s in old_sets], _set(500, "collecting", (20.03, 20.04))])
    delta = protocol.snapshot_delta(old, new)
    assert delta["base_seq"] == 7 and delta["seq"] == 9
    assert delta["changed"] == {}  # state and results as before
    assert delta["sets"] == []  # no new set
    assert [change["id"] for change in delta["set_changes"]] == [500]
    assert len(protocol.encode_from_daemon(delta)) < 300  # not the 500 sets
    rebuilt = protocol.apply_delta(old, json.loads(json.dumps(delta)))
    assert rebuilt == new
    assert rebuilt["sets"][0] is old["sets"][0]  # unchanged parts are the very objects held
    assert rebuilt["results"] is old["results"]


def test_the_current_set_is_sent_once_and_is_the_very_set_among_the_sets():
    # invented readings, for the shape of the message only
    sets = [_set(i, "superseded", (20.01, 20.02)) for i in range(1, 4)]
    old = {**_snapshot(7, [*sets, _set(4, "collecting", (20.03,))]), "current_set": None}
    old["current_set"] = old["sets"][-1]
    grown = _set(4, "collecting", (20.03, 20.04))
    new = {**_snapshot(8, [*sets, grown]), "current_set": grown}
    delta = protocol.snapshot_delta(old, new)
    assert "current_set" not in delta["changed"] and delta["current_set_id"] == 4
    assert protocol.encode_from_daemon(delta).count(b"20.04") == 1
    assert b"20.03" not in protocol.encode_from_daemon(delta)  # the reading held is not resent
    rebuilt = protocol.apply_delta(old, json.loads(json.dumps(delta)))
    assert rebuilt == new
    assert rebuilt["current_set"] is rebuilt["sets"][-1]


def test_a_delta_of_another_session_sends_its_sets_whole_and_a_missed_delta_is_named():
    old = _snapshot(3, [_set(1, "accepted", (20.0,)), _set(2, "reviewing", (20.1,))])
    new = _snapshot(4, [_set(3, "collecting", ())], state="waiting_for_operator")
    delta = protocol.snapshot_delta(old, new)
    assert delta["changed"]["sets"] == new["sets"] and delta["sets"] == []
    assert protocol.apply_delta(old, delta) == new
    with pytest.raises(protocol.DeltaGap, match="applies to snapshot 4, not to 3"):
        protocol.apply_delta(old, protocol.snapshot_delta(new, new | {"seq": 5}))


def _reading(set_id: int, seq: int, charge_nC: float, flags: list | None = None) -> dict:
    return {"id": 1000 * set_id + seq, "seq": seq, "charge_nC": charge_nC, "flags": flags or []}


def test_a_reading_added_to_a_long_set_sends_that_reading_and_the_sets_statistics_only():
    # invented readings, for the shape of the message only
    held = [_reading(7, seq, 20.0 + 0.001 * seq) for seq in range(1, 60)]
    old_set = {"id": 7, "status": "collecting", "readings": held, "stats": {"mean_nC": 20.03}}
    new_reading = _reading(7, 60, 20.06)
    new_set = {**old_set, "readings": [*held, new_reading], "stats": {"mean_nC": 20.0305}}
    old = {**_snapshot(11, [old_set]), "current_set": old_set}
    new = {**_snapshot(12, [new_set]), "current_set": new_set}
    delta = json.loads(json.dumps(protocol.snapshot_delta(old, new)))
    assert delta["sets"] == [] and delta["current_set_id"] == 7
    (change,) = delta["set_changes"]
    assert change["changed"] == {"stats": {"mean_nC": 20.0305}}
    assert change["readings_count"] == 60
    assert change["readings_at"] == [[59, new_reading]]  # the new reading, none of the 59 held
    rebuilt = protocol.apply_delta(old, delta)
    assert rebuilt == new and rebuilt["current_set"] is rebuilt["sets"][0]
    assert rebuilt["sets"][0]["readings"][0] is held[0]  # readings held are kept, not resent


def test_a_reading_whose_flags_changed_is_sent_again_by_its_position():
    # invented readings: a third reading makes the first an outlier (its flags change)
    first, second = _reading(3, 1, 20.0), _reading(3, 2, 20.01)
    flagged = {**first, "flags": [{"code": "outlier", "message": "x", "severity": "warning"}]}
    third = _reading(3, 3, 20.011)
    old = _snapshot(4, [{"id": 3, "readings": [first, second]}])
    new = _snapshot(5, [{"id": 3, "readings": [flagged, second, third]}])
    delta = protocol.snapshot_delta(old, new)
    assert delta["set_changes"][0]["readings_at"] == [(0, flagged), (2, third)]
    assert protocol.apply_delta(old, json.loads(json.dumps(delta))) == new


def test_a_set_change_that_does_not_fit_the_set_held_is_a_gap_not_a_wrong_set():
    # invented readings: the client holds a set with one reading fewer than the delta expects
    held = _snapshot(4, [{"id": 3, "readings": [_reading(3, 1, 20.0)]}])
    change = {"id": 3, "changed": {}, "readings_count": 3, "readings_at": [[2, _reading(3, 3, 1)]]}
    delta = {"seq": 5, "base_seq": 4, "changed": {}, "sets": [], "set_changes": [change]}
    with pytest.raises(protocol.DeltaGap, match="set 3"):
        protocol.apply_delta(held, delta)
    unknown = {**delta, "set_changes": [{**change, "id": 9}]}
    with pytest.raises(protocol.DeltaGap, match="set 9, which is not held"):
        protocol.apply_delta(held, unknown)
