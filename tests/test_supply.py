"""Bench supply driver: exact bytes through the scripted transport, and the simulated supply on loopback."""

from __future__ import annotations

import pytest

from bench.drivers.supply import Supply, load_supply_profile
from bench.errors import InstrumentError
from bench.sim.scpi import ScpiServer, SimSupply
from bench.sim.state import SimState
from bench.transports import ScriptedTransport, open_transport

PROFILE = load_supply_profile("scpi-supply")


def _script(error: str = '0,"No error"', state: dict | None = None):
    state = state if state is not None else {"on": True}

    def answer(command: str) -> str | None:
        if command in ("OUTP ON", "OUTP OFF"):
            state["on"] = command == "OUTP ON"
            return None
        return {"*IDN?": "maker,supply,1,1.0", "SYST:ERR?": error,
                "OUTP?": "1" if state["on"] else "0"}.get(command)

    return answer


def test_switching_sends_exactly_these_lines():
    transport = ScriptedTransport(_script())
    waits: list[float] = []
    supply = Supply(transport, PROFILE, wait=waits.append)
    assert supply.initialize() == "maker,supply,1,1.0"
    supply.set_output(False)
    supply.set_output(True)
    assert transport.sent == ["*CLS", "*IDN?", "OUTP OFF", "SYST:ERR?", "OUTP?", "OUTP ON", "SYST:ERR?", "OUTP?"]
    assert waits == [2.0, 2.0]  # the profile's settle = "2 s"


def test_a_refused_switch_is_an_instrument_error_with_the_code():
    transport = ScriptedTransport(_script(error='-113,"Undefined header"'))
    supply = Supply(transport, PROFILE)
    with pytest.raises(InstrumentError) as caught:
        supply.set_output(False)
    # SCPI-1999 error -113: undefined header
    assert (caught.value.code, caught.value.text, caught.value.command) == (-113, "Undefined header", "OUTP OFF")
    assert transport.sent == ["OUTP OFF", "SYST:ERR?"]  # the state is not queried after a refusal


def test_simulated_supply_switches_the_board_over_loopback():
    state = SimState()
    with ScpiServer(SimSupply(state).open_session) as server:
        transport = open_transport(f"TCPIP::127.0.0.1::{server.port}::SOCKET", PROFILE.io)
        try:
            supply = Supply(transport, PROFILE)
            assert supply.initialize().split(",")[1] == "SimSupply-1"
            supply.set_output(False)
            assert state.board_powered is False
            supply.set_output(True)
            assert state.board_powered is True
        finally:
            supply.close()
