"""Cautions for people at the bench: what can hurt someone or something, said where it matters.

One set of texts for the run banner, the confirmation before the first motion or power switch,
and the report. Which apply depends on the instruments the run uses.
"""

from __future__ import annotations

__all__ = ["analyzer_caution", "cautions_for", "ESTIMATE", "LOCAL_RULES", "MOTION", "POWER"]

ESTIMATE = ("A pre-scan is an estimate, not a compliance verdict: defer to the applicable standard, "
            "an accredited test house and local regulations.")
LOCAL_RULES = "Local safety rules and licensed practice come first."
MAINS = ("Boards under test may carry mains or high voltage; probes and the stage come close to them. "
         "Follow your site's electrical safety rules.")
RF_EXPOSURE = ("Near intentional radiators (a board with a radio, a test source) follow the RF exposure "
               "rules that apply to you.")
MOTION = {
    "stage": ("The XYZ stage will home and move a probe close to the board: keep hands clear, check the "
              "soft limits and the safe travel height in the bench file, keep the emergency stop in reach."),
    "mast": "The antenna mast will change height and polarization: keep the area around it clear.",
    "turntable": "The turntable will rotate the board under test: keep hands and cables clear.",
}
POWER = ("The bench supply will switch the board off and on (ambient captures): make sure nothing "
         "connected to the board is harmed by losing power.")


def analyzer_caution(profile_name: str, damage_level_dbm: float) -> str:
    """The analyzer input caution with the damage level the profile assumes."""
    return (f"Analyzer input (profile {profile_name}): damaged above {damage_level_dbm:+g} dBm or by any "
            "DC voltage (0 V DC rating); use an attenuator, a DC block and a limiter, especially with probes near switching "
            "nodes and with line impedance stabilisation networks.")


def cautions_for(roles: set[str], analyzer: str) -> list[str]:
    """The cautions for a run using ``roles`` (``stage``, ``mast``, ``turntable``, ``supply``).

    ``analyzer`` is the text of :func:`analyzer_caution`.
    """
    out = [analyzer]
    out += [MOTION[role] for role in ("stage", "mast", "turntable") if role in roles]
    if "supply" in roles:
        out.append(POWER)
    out += [MAINS, RF_EXPOSURE, LOCAL_RULES]
    return out
