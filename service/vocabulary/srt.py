"""Legacy SNOMED-RT (SRT) identifiers -> SNOMED CT (SCT) concept ids.

Older devices still send SRT codes (e.g. T-35300 for Mitral Valve).  pydicom ships the full
PS3.16 mapping table in a private module; it is used when importable, and a vendored subset
(the codes this project's tables rely on, copied from that same table) is the fallback.
"""

from __future__ import annotations

#: subset of pydicom 3.0.2 ``pydicom.sr._snomed_dict.mapping["SRT"]`` (PS3.16 Annex O)
_VENDORED: dict[str, str] = {
    "T-35300": "91134007",  # Mitral valve
    "T-35310": "65197004",  # Mitral annulus
    "G-0391": "399093001",  # Medial mitral annulus
    "G-0392": "399086000",  # Lateral mitral annulus
    "T-35100": "46030003",  # Tricuspid valve
    "T-32300": "82471001",  # Left atrium
    "T-32600": "87878005",  # Left ventricle
    "T-32500": "53085002",  # Right ventricle
    "T-48581": "122972007",  # Pulmonary venous structure
    "T-4858F": "430757002",  # Pulmonary vein
    "G-C0E3": "363698007",  # Finding Site
    "G-0373": "399264008",  # Image Mode
    "G-C036": "370129005",  # Measurement Method
    "G-C048": "260674002",  # Flow Direction
    "R-4089A": "272518008",  # Cardiac Cycle Point
    "G-A1F8": "106233006",  # Topographical Modifier
    "R-409E4": "261199008",  # Doppler Pulsed
    "R-409E3": "261198000",  # Doppler Continuous Wave
    "P5-B0128": "439858009",  # Tissue Doppler Imaging
    "G-0367": "397417004",  # Regurgitant Flow
    "R-00317": "373098007",  # Mean
}


def _load() -> dict[str, str]:
    try:
        from pydicom.sr._snomed_dict import mapping  # private module: may move

        table = mapping.get("SRT")
        if isinstance(table, dict) and table:
            return {str(k): str(v) for k, v in table.items()}
    except Exception:  # pragma: no cover - depends on the installed pydicom
        pass
    return dict(_VENDORED)  # pragma: no cover


SRT_TO_SCT: dict[str, str] = _load()


def normalise(scheme: str, value: str) -> tuple[str, str]:
    """(scheme, value) with SRT rewritten to SCT where a mapping exists."""
    if scheme == "SRT":
        sct = SRT_TO_SCT.get(value)
        if sct is not None:
            return "SCT", sct
    return scheme, value
