"""The demo's invented names cannot be taken for a real centre, person, product or code (issue 13).

The clinic is "Example Clinic (fictional)", its machines are named ``DEMO-…``, serial numbers
carry the prefix ``SIM-``, people appear only as roles ("operator A", "reviewer B"), and each
invented serial dialect zeroes with a command of its own. These tests read the shipped demo data,
the examples, the simulator's identity replies and every tracked text file.
"""

from __future__ import annotations

import json
import re
import subprocess
import tomllib
from pathlib import Path

import pytest
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.drivers_generic import available_profiles, load_profile
from chargebook.drivers_generic.lines import parse_identity
from chargebook.drivers_generic.simulator.device import SimulatedElectrometer
from chargebook.drivers_generic.simulator.dialect import DEFAULT_SERIAL_NUMBER, DialectResponder
from chargebook.drivers_generic.simulator.physics import ChamberParameters, ChamberPhysics
from chargebook.drivers_generic.simulator.scpi_server import ScpiResponder

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "acquire" / "examples"
ROLE = re.compile(r"(demo operator|(operator|reviewer) [A-Z])")
#: An initial, a full stop, a space and a capitalised surname. Not after a number and a space,
#: which is a unit ending a sentence ("+300 V. Deliver ...").
PERSONAL_NAME = re.compile(r"(?<![0-9] )(?<![0-9])\b[A-Z]\. [A-Z][a-z]+")
#: Authors of published methods cited by name in docs/physics.md (not invented people).
CITED_AUTHORS = {"B. Iglewicz", "C. Hoaglin"}
#: The zero command of each invented serial dialect: words of our own.
OWN_ZERO_COMMANDS = {"query-plain": "QZ", "push-exponent": "ZQ", "query-engineering": "CHG0"}


def _examples() -> list[tuple[str, dict]]:
    """Return the example worksheets that describe a session (name, parsed contents)."""
    found = []
    for path in sorted(EXAMPLES.iterdir()):
        if path.suffix == ".toml":
            found.append((path.name, tomllib.loads(path.read_text(encoding="utf-8"))))
        elif path.suffix == ".json":
            found.append((path.name, json.loads(path.read_text(encoding="utf-8"))))
    return [(name, worksheet) for name, worksheet in found if "session" in worksheet]


def _tracked_text_files() -> list[Path]:
    listed = subprocess.run(
        ["git", "ls-files", "-z"], cwd=ROOT, capture_output=True, check=True, timeout=60
    ).stdout.decode()
    paths = [ROOT / name for name in listed.split("\0") if name]
    return [path for path in paths if path.is_file() and path.suffix not in {".png", ".sqlite"}]


def test_the_demo_metadata_names_a_demo_machine_and_sim_serials():
    meta = demo_metadata()
    assert meta["treatment_machine"].startswith("DEMO-")
    assert meta["chamber_serial"].startswith("SIM-CH-")
    assert meta["electrometer_serial"].startswith("SIM-EM-")
    assert ROLE.fullmatch(meta["operator"])
    assert "(fictional)" in meta["notes"]


@pytest.mark.parametrize(("name", "worksheet"), _examples())
def test_every_example_names_a_demo_machine_sim_serials_and_an_operator_role(name, worksheet):
    session = worksheet["session"]
    assert name.startswith("demo-")
    assert session["machine"].startswith("DEMO-"), session["machine"]
    assert session["chamber"].endswith(tuple(f"serial SIM-CH-{n:04d}" for n in range(1, 10)))
    assert session["electrometer"].startswith("SIM-EM-")
    assert ROLE.fullmatch(session["operator"]), session["operator"]


def test_the_examples_are_all_checked():
    assert len(_examples()) >= 4


@pytest.mark.parametrize("name", sorted(OWN_ZERO_COMMANDS))
def test_each_serial_dialect_zeroes_with_its_own_command_and_the_simulator_obeys(name):
    profile = load_profile(name)
    assert profile.command("zero").templates == (OWN_ZERO_COMMANDS[name],)
    device = SimulatedElectrometer(ChamberPhysics(ChamberParameters(), seed=1))
    speaker = DialectResponder(profile, device)
    refused = speaker.respond("NO-SUCH-COMMAND")
    answer = speaker.respond(OWN_ZERO_COMMANDS[name])
    assert answer != refused


@pytest.mark.parametrize("name", [n for n in available_profiles() if n != "scpi-generic"])
def test_the_simulated_dialects_identify_with_a_sim_serial(name):
    profile = load_profile(name)
    device = SimulatedElectrometer(ChamberPhysics(ChamberParameters(), seed=1))
    (line,) = DialectResponder(profile, device).respond(profile.command("identify").templates[0])
    identity = parse_identity(profile.identity, line.encode("ascii"))
    assert identity.serial == DEFAULT_SERIAL_NUMBER and identity.serial.startswith("SIM-EM-")
    assert identity.model == name.upper()


def test_the_simulated_scpi_instrument_identifies_with_a_sim_serial():
    device = SimulatedElectrometer(ChamberPhysics(ChamberParameters(), seed=1))
    (line,) = ScpiResponder(device).respond("*IDN?")
    assert line.split(",")[2].startswith("SIM-EM-")


def test_no_tracked_file_names_a_person_as_initial_and_surname():
    found = set()
    for path in _tracked_text_files():
        text = path.read_text(encoding="utf-8", errors="replace")
        for match in PERSONAL_NAME.finditer(text):
            if match.group() not in CITED_AUTHORS:
                found.add(f"{path.relative_to(ROOT)}: {match.group()}")
    assert not found, sorted(found)
