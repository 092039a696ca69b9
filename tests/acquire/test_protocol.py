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
