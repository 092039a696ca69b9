"""The malformed messages the fault run found dropping a connection, each checked on its own.

Before they were fixed, each of these made the daemon's connection handler fail with a
traceback and close the connection without an answer: JSON nested thousands deep (the parser
runs out of recursion), NaN where JSON-RPC wants an id (the error reply could not be encoded),
and NaN among the parameters (the same, from the parameter error). JSON has no NaN (RFC 8259,
section 6), so it is now a parse error, and an id that cannot be read is answered as null
(JSON-RPC 2.0 specification, section 5).
"""

from __future__ import annotations

import asyncio
import json

import pytest
from chargebook.acquire import protocol

from tests.faults.sessions import quick_station

pytestmark = pytest.mark.e2e

CASES = [
    (b"[" * 20_000, protocol.PARSE_ERROR),
    (b'{"jsonrpc": "2.0", "id": NaN, "method": "status"}', protocol.PARSE_ERROR),
    (b'{"jsonrpc": "2.0", "id": 3, "method": "environment.set", '
     b'"params": {"temperature_C": NaN, "pressure": 100.8}}', protocol.PARSE_ERROR),
    (b'{"jsonrpc": "2.0", "id": 1e999, "method": "status"}', protocol.INVALID_REQUEST),
    (b'{"jsonrpc": "2.0", "id": 4, "method": "environment.set", '
     b'"params": {"temperature_C": 1e999, "pressure": "high"}}', protocol.INVALID_PARAMS),
]  # fmt: skip


async def test_each_message_gets_an_error_and_the_connection_stays_open():
    with quick_station("bad-rpc-cases") as world:
        reader, writer = await asyncio.open_unix_connection(str(world.socket), limit=1 << 20)
        try:
            for line, code in CASES:
                writer.write(line + b"\n")
                reply = json.loads(await asyncio.wait_for(reader.readline(), 10))
                assert reply["error"]["code"] == code, (line[:60], reply)
                assert reply["id"] in (None, 3, 4)
            writer.write(b'{"jsonrpc": "2.0", "id": "after", "method": "status"}\n')
            reply = json.loads(await asyncio.wait_for(reader.readline(), 10))
            assert reply["id"] == "after" and reply["result"]["state"] == "idle"
        finally:
            writer.close()
        assert "Traceback" not in world.daemon_logs()
