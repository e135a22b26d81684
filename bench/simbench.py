"""Start the simulated bench on loopback and point a bench file's addresses at it.

The simulated instruments are real network peers: the analyzer and the board's supply speak
SCPI on TCP (VISA resource ``TCPIP::127.0.0.1::<port>::SOCKET``), the stage speaks G-code on TCP
(``socket://127.0.0.1:<port>``) and on a pseudo-terminal, the mast and turntable speak their
line dialect on TCP. They share one world (board, probe pose, antenna pose, virtual clock), so
the spectrum depends on where the probe or the antenna is.
"""

from __future__ import annotations

import dataclasses
import logging
import signal
import threading
from pathlib import Path

from bench.errors import ConfigError

__all__ = ["SimulatedBench", "start_simulated_bench", "serve_forever", "parse_faults"]

log = logging.getLogger("bench.sim")


def parse_faults(texts: list[str]):
    """``["drop-after-sweeps=20"]`` -> ``Faults(drop_after_sweeps=20)`` (one-line errors)."""
    from bench.sim.scpi import Faults

    names = {f.name for f in dataclasses.fields(Faults)}
    values = {}
    for text in texts:
        key, sep, value = text.partition("=")
        field = key.strip().replace("-", "_")
        if not sep or field not in names:
            known = ", ".join(sorted(n.replace("_", "-") for n in names))
            raise ConfigError(f"--fault: expected NAME=VALUE with NAME one of {known}, found {text!r}")
        if field in values:
            raise ConfigError(f"--fault {key.strip()}: expected each fault once, found it again ({text!r})")
        if field == "error_text":
            values[field] = value.strip()
        else:
            values[field] = _fault_count(key.strip(), value, minimum=_FAULT_MINIMUM.get(field, 1))
    return Faults(**values)


# error-code is a SCPI code (negative); refuse-after-drop counts refusals (0: none)
_FAULT_MINIMUM = {"error_code": None, "refuse_after_drop": 0}


def _fault_count(key: str, value: str, *, minimum: int | None) -> int:
    try:
        count = int(value)
    except ValueError:
        raise ConfigError(f"--fault {key}: expected a whole number, found {value!r}") from None
    if minimum is not None and count < minimum:
        raise ConfigError(f"--fault {key}: expected a whole number >= {minimum}, found {count}")
    return count


class SimulatedBench:
    """Every simulated instrument of one bench, sharing one world.

    Parameters
    ----------
    board : bench.sim.board.Board
        The simulated board (emitters, ambient, probes, site, stage placement, receiver).
    seed : int
        Seed of every random draw (noise, frequency tolerances).
    realtime : bool
        Sweeps and moves take their physical time; otherwise the virtual clock jumps.
    faults : Faults, optional
        Analyzer faults to inject.
    stage_limits_m : dict, optional
        Physical travel of the simulated stage per axis ('x', 'y', 'z'), metres.
    mast_travel_m, turntable_travel_deg : tuple, optional
        Physical travel of the mast and the turntable.
    """

    def __init__(self, board, *, seed: int = 1, realtime: bool = False, faults=None, stage_limits_m=None,
                 mast_travel_m=(1.0, 4.0), turntable_travel_deg=(0.0, 360.0), analyzer_port: int = 0) -> None:
        from bench.sim.clock import VirtualClock
        from bench.sim.gcode import SimStage
        from bench.sim.positioner import SimPositioner
        from bench.sim.scpi import SimAnalyzer, SimSupply
        from bench.sim.state import SimState
        from bench.sim.world import World

        self.state = SimState()
        self.clock = VirtualClock(realtime=realtime, state=self.state)
        self.world = World(board, seed=seed)
        self.analyzer = SimAnalyzer(self.world, self.state, self.clock, seed=seed,
                                    noise_figure_db=self.world.noise_figure_db, faults=faults)
        self.supply = SimSupply(self.state)
        self.supply.set_output(True)  # the board starts powered, as the operator left it
        self.stage = SimStage(self.state, self.clock, limits_m=stage_limits_m)
        self.positioners = SimPositioner(self.state, self.clock, mast_travel_m=tuple(mast_travel_m),
                                         turntable_travel_deg=tuple(turntable_travel_deg))
        self._analyzer_port = analyzer_port
        self._servers: list = []
        self.addresses: dict[str, str] = {}

    def start(self) -> dict[str, str]:
        """Start every server on loopback; return role -> address."""
        from bench.sim.scpi import ScpiServer

        analyzer = ScpiServer(self.analyzer.open_session, port=self._analyzer_port)
        analyzer.start()
        supply = ScpiServer(self.supply.open_session)
        supply.start()
        self._servers += [analyzer, supply]
        stage_tcp = self.stage.serve_tcp()
        stage_pty = self.stage.serve_pty()
        positioners = self.positioners.serve_tcp()
        self._servers += [stage_tcp, stage_pty, positioners]
        self.addresses = {
            "analyzer": analyzer.resource,
            "analyzer_socket": analyzer.url,
            "supply": supply.resource,
            "supply_socket": supply.url,
            "stage": stage_tcp.url,
            "stage_pty": stage_pty.path,
            "mast": positioners.url,
            "turntable": positioners.url,
        }
        return self.addresses

    def wait(self, seconds: float) -> None:
        """Settle times on the simulated bench pass on its clock."""
        self.clock.advance(seconds)

    def stop(self) -> None:
        """Stop every server (errors while stopping are ignored)."""
        for server in reversed(self._servers):
            try:
                server.stop()
            except Exception:  # noqa: BLE001 - stopping servers must not mask the run's result
                pass
        self._servers.clear()


def _load_board(board_path: Path | None):
    from bench.sim.board import demo_board, load_board

    return demo_board() if board_path is None else load_board(board_path)


def start_simulated_bench(bench, *, board: Path | None = None, seed: int = 1, realtime: bool = False,
                          faults: list[str] | None = None):
    """Start the simulator for ``bench`` and return (simulator, bench with loopback addresses)."""
    fault_set = parse_faults(faults or []) if faults else None
    limits = None
    if bench.stage is not None:
        lim = bench.stage.limits
        limits = {"x": tuple(lim.x_m), "y": tuple(lim.y_m), "z": tuple(lim.z_m)}
    sim = SimulatedBench(
        _load_board(board), seed=seed, realtime=realtime, faults=fault_set, stage_limits_m=limits,
        mast_travel_m=bench.mast.height_limits_m if bench.mast is not None else (1.0, 4.0),
        turntable_travel_deg=bench.turntable.azimuth_limits_deg if bench.turntable is not None else (0.0, 360.0),
    )
    addresses = sim.start()
    log.debug("simulated bench: analyzer %s, stage %s, mast/turntable %s, supply %s",
             addresses["analyzer"], addresses["stage"], addresses["mast"], addresses["supply"])
    update = {}
    for role in ("analyzer", "stage", "mast", "turntable", "supply"):
        section = getattr(bench, role, None)
        if section is not None:
            update[role] = section.model_copy(update={"address": _simulated_address(role, section.address, addresses)})
    if getattr(bench, "supply", None) is None:
        from bench.benchfile import SupplySection

        update["supply"] = SupplySection.model_validate({"address": addresses["supply"]})
    return sim, bench.model_copy(update=update)


def _simulated_address(role: str, original: str, addresses: dict[str, str]) -> str:
    """The simulator's address for ``role``, over the same kind of wire the bench file names.

    An SCPI instrument the bench file reaches at a ``socket://`` URL is reached at the
    simulator's ``socket://`` URL too, so ``--sim`` runs the transport the bench would run.
    """
    if original.strip().lower().startswith("socket://") and f"{role}_socket" in addresses:
        return addresses[f"{role}_socket"]
    return addresses[role]


def serve_forever(*, port: int = 0, board: Path | None = None, seed: int = 1, realtime: bool = False,
                  announce=None) -> int:
    """``bench sim``: serve until interrupted; ``announce(addresses)`` is called once serving.

    Raises
    ------
    ConfigError
        ``port`` is not a TCP port number (0-65535) or cannot be bound (in use, not allowed).
    """
    if not 0 <= int(port) <= 65535:
        raise ConfigError(f"expected a TCP port number 0-65535 (0: any free port), found {port}", key="--port")
    sim = SimulatedBench(_load_board(board), seed=seed, realtime=realtime, analyzer_port=port)
    try:
        addresses = sim.start()
    except OSError as exc:
        sim.stop()
        raise ConfigError(f"cannot serve the analyzer on 127.0.0.1 port {port}: {exc.strerror or exc}",
                          key="--port") from None
    if announce is not None:
        announce(addresses)
    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    try:
        stop.wait()
    except KeyboardInterrupt:
        pass
    finally:
        sim.stop()
    return 0
