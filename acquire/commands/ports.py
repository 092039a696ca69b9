"""`chargebook ports`: list serial ports and local VISA resources (never network discovery)."""

from __future__ import annotations

import argparse

HELP = "list serial ports and local VISA resources (ASRL and USB only, no network discovery)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the options of `chargebook ports`."""
    parser.add_argument("--json", action="store_true", help="print the list as JSON")


def run(args: argparse.Namespace) -> int:
    """Print the ports found; return 0."""
    import json

    from chargebook.drivers_generic.discovery import serial_ports, visa_resources

    serial = serial_ports()
    visa, problems = visa_resources()
    if args.json:
        document = {
            "serial": [port.to_dict() for port in serial],
            "visa": [port.to_dict() for port in visa],
            "problems": problems,
        }
        print(json.dumps(document, indent=2))
        return 0
    print("Serial ports:")
    for port in serial or ():
        print(f"  {port.name:<24} {port.description}")
    if not serial:
        print("  (none found)")
    print("VISA resources (ASRL?*::INSTR, USB?*::INSTR):")
    for port in visa:
        print(f"  {port.name}")
    if not visa:
        print("  (none found)")
    for problem in problems:
        print(f"  note: {problem}")
    return 0
