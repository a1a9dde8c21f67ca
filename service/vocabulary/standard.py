"""Standard mapping table: DICOM PS3.16 codes (TID 5300 pre-coordinated CID 12300, TID 5200
section concepts, TID 5200/5302 post-coordinated generic concepts) -> canonical quantities.

Every code below is declared once in :data:`CODES` with the meaning and the CIDs pydicom 3.0.2's
bundled dictionary (generated from PS3.16) gives for it; ``tests/test_standard_codes.py``
checks each against ``pydicom.sr._concepts_dict``.  Codes pydicom lacks are marked
``from_memory=True`` and are not claimed to be verified.
"""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict

from service.model import Code, Measure
from service.vocabulary.measures import Component
from service.vocabulary.rules import MODIFIER_NAMES, Condition, Rule, RuleOrigin


class KnownCode(BaseModel):
    model_config = ConfigDict(frozen=True)

    code: Code
    cids: tuple[int, ...] = ()  # CID membership claimed (checked against pydicom)
    from_memory: bool = False


def _k(value: str, scheme: str, meaning: str, *cids: int, memory: bool = False) -> KnownCode:
    return KnownCode(
        code=Code(value=value, scheme=scheme, meaning=meaning), cids=cids, from_memory=memory
    )


#: every standard code used in the tables (meaning as in pydicom 3.0.2, PS3.16)
CODES: dict[str, KnownCode] = {
    # --- CID 12300 Core Echo Measurement (TID 5301 pre-coordinated) ---
    "mv_e_vmax": _k("80070-6", "LN", "Mitral valve E-wave Vmax", 12300),
    "mv_a_vmax": _k("80066-4", "LN", "Mitral valve A-wave Vmax", 12300),
    "mv_e_a": _k("18038-0", "LN", "Mitral Valve E to A Ratio", 12207, 12300),
    "mv_dt": _k("78191-4", "LN", "Mitral valve deceleration time", 12300),
    "mv_a_dur": _k("80065-6", "LN", "Mitral valve A-wave duration", 12300),
    "septal_e_prime": _k("79911-4", "LN", "Mitral septal e-prime Vmax", 12300),
    "lateral_e_prime": _k("80054-0", "LN", "Mitral lateral e-prime Vmax", 12300),
    "tr_vmax": _k("79921-3", "LN", "Tricuspid regurgitation Vmax", 12300),
    "lavi_mod": _k("79984-1", "LN", "Left atrial end systolic volume biplane (MOD) / BSA", 12300),
    "lavi_al": _k(
        "79982-5", "LN", "Left atrial end systolic volume biplane (area-length) / BSA", 12300
    ),
    "lvef_mod": _k("79991-6", "LN", "Left ventricular ejection fraction biplane (MOD)", 12300),
    "lvef_3d": _k("79990-8", "LN", "Left ventricular ejection fraction 3D", 12300),
    "lvef_4c": _k(
        "79993-2", "LN", "Left ventricular ejection fraction single plane 4C (MOD)", 12300
    ),
    "lvef_2c": _k(
        "79992-4", "LN", "Left ventricular ejection fraction single plane 2C (MOD)", 12300
    ),
    "ivrt_doppler": _k(
        "18071-1", "LN", "Left ventricular isovolumic relaxation time by Doppler", 12300
    ),
    "ivrt_tdi": _k("80015-1", "LN", "Left ventricular isovolumic relaxation time by TDI", 12300),
    "pv_s_vmax": _k("79917-1", "LN", "Pulmonary vein S-wave Vmax", 12300),
    "pv_d_vmax": _k("79916-3", "LN", "Pulmonary vein D-wave Vmax", 12300),
    "pv_ar_dur": _k("78184-9", "LN", "Pulmonary vein A-wave duration", 12300),
    # --- TID 5200 section concepts ---
    "mv_e_peak": _k("18037-2", "LN", "Mitral Valve E-Wave Peak Velocity", 12207),
    "mv_a_peak": _k("17978-8", "LN", "Mitral Valve A-Wave Peak Velocity", 12207),
    "mv_dt_sct": _k("399354002", "SCT", "Mitral Valve E-Wave Deceleration Time", 12207),
    "mv_a_dur_sct": _k("399229004", "SCT", "Mitral Valve A-Wave Duration", 12207),
    "lv_e_prime": _k(
        "399133000", "SCT", "Left Ventricular Peak Early Diastolic Tissue Velocity", 12200, 12203
    ),
    "e_over_e_prime_sct": _k(
        "399140004",
        "SCT",
        "Ratio of mitral valve peak velocity to left ventricular peak tissue velocity e-wave "
        "(observable entity)",
    ),
    "lvef_us": _k("18043-0", "LN", "Left Ventricular Ejection Fraction by US", 12200, 12202),
    "la_volume": _k("399235004", "SCT", "Left Atrium Systolic Volume", 12205),
    "pv_s_d": _k("29452-0", "LN", "Pulmonary Vein Systolic to Diastolic Ratio", 12214),
    "pv_s_peak": _k("29450-4", "LN", "Pulmonary Vein Systolic Peak Velocity", 12214),
    "pv_d_peak": _k("29451-2", "LN", "Pulmonary Vein Diastolic Peak Velocity", 12214),
    "pv_ar_dur_sct": _k("399070007", "SCT", "Pulmonary Vein A-Wave Duration", 12214),
    "rvsp": _k("399023006", "SCT", "Right Ventricular Peak Systolic Pressure", 12204),
    "heart_rate": _k("8867-4", "LN", "Heart rate", 12207, 12220),
    "subject_age": _k("121033", "DCM", "Subject Age"),
    # --- generic (orifice-flow / property) concepts, CID 12222 / 12304 ---
    "e_wave_peak": _k("59080-2", "LN", "E-Wave Peak Velocity", 12222),
    "a_wave_peak": _k("59081-0", "LN", "A-Wave Peak Velocity", 12222),
    "e_a_generic": _k("59104-0", "LN", "Peak E wave/Peak A wave by US", 12222),
    "decel_time": _k("20217-6", "LN", "Deceleration Time", 12222, 12304),
    "peak_blood_velocity": _k("20355-4", "LN", "Peak Blood Velocity", 12222, 12304),
    "peak_tissue_velocity": _k("125330", "DCM", "Peak Tissue Velocity", 12304),
    "e_over_annulus_e": _k("59111-5", "LN", "E Velocity to Annulus E Velocity Ratio", 12222),
    "s_d_generic": _k("12144-2", "LN", "Systolic to Diastolic Velocity Ratio", 12222),
    "accel_slope": _k("20167-3", "LN", "Acceleration Slope", 12222),
    "peak_la_strain": _k("130671", "DCM", "Peak Longitudinal Lagrangian Strain", 12304),
    "ejection_fraction": _k(
        "70822001", "SCT", "Cardiac ejection fraction, function (observable entity)"
    ),
    # --- modifier names ---
    "finding_site": _k("363698007", "SCT", "Finding Site"),
    "image_mode": _k("399264008", "SCT", "Image mode (observable entity)"),
    "cardiac_phase": _k("272518008", "SCT", "Cardiovascular cycle point (qualifier value)"),
    "flow_direction": _k("260674002", "SCT", "Direction of flow (attribute)"),
    "measurement_method": _k("370129005", "SCT", "Measurement Method"),
    "topographical_modifier": _k("106233006", "SCT", "Topographical modifier"),
    "measured_property": _k("125307", "DCM", "Measured Property"),
    "measurement_type": _k("125306", "DCM", "Measurement Type"),
    "derivation": _k("121401", "DCM", "Derivation"),
    "selection_status": _k("121404", "DCM", "Selection Status"),
    "stage": _k("18139-6", "LN", "Stage", memory=True),
    # --- modifier values ---
    "mitral_valve": _k("91134007", "SCT", "Mitral valve structure (body structure)"),
    "mitral_annulus": _k(
        "65197004", "SCT", "Structure of anulus fibrosus of mitral orifice (body structure)"
    ),
    "medial_annulus": _k("399093001", "SCT", "Medial mitral annulus structure (body structure)"),
    "lateral_annulus": _k("399086000", "SCT", "Lateral mitral annulus structure (body structure)"),
    "tricuspid_valve": _k("46030003", "SCT", "Tricuspid valve structure (body structure)"),
    "left_atrium": _k("82471001", "SCT", "Left atrium", 12305),
    "left_ventricle": _k("87878005", "SCT", "Left ventricular structure (body structure)"),
    "pulmonary_venous_structure": _k(
        "122972007", "SCT", "Pulmonary venous structure (body structure)"
    ),
    "pulmonary_vein": _k("430757002", "SCT", "Pulmonary Vein", 12283, 12305),
    "pw_doppler": _k("261199008", "SCT", "Doppler Pulsed", 12224),
    "cw_doppler": _k("261198000", "SCT", "Doppler Continuous Wave", 12224),
    "tdi": _k("439858009", "SCT", "Tissue Doppler Imaging", 12224),
    "regurgitant_flow": _k("397417004", "SCT", "Regurgitant Flow", 12221),
    # the same SNOMED CT concepts are "Antegrade/Retrograde Flow" in CID 12221 (TID 5200) and
    # "Antegrade/Retrograde Direction" in CID 12306 (TID 5302 Flow Direction)
    "antegrade_flow": _k("263677008", "SCT", "Antegrade Flow", 12221, 12306),
    "retrograde_flow": _k("312004007", "SCT", "Retrograde Flow", 12221, 12306),
    "e_wave_phase": _k("444392003", "SCT", "Diastolic Rapid Inflow (E-wave)", 12307),
    "a_wave_phase": _k("59972007", "SCT", "Atrial systole, function (observable entity)"),
    "early_diastole": _k("444389002", "SCT", "Early Diastole"),
    "s_wave_phase": _k("444371003", "SCT", "Ventricular Ejection (S-wave)", 12307),
    "d_wave_phase": _k("125322", "DCM", "Atrial Diastolic Filling (D-wave)", 12307),
    "valsalva": _k("261039008", "SCT", "Valsalva maneuver", 12002),
    "user_chosen": _k("121410", "DCM", "User chosen value", 224, 12301),
    "most_recent": _k("121411", "DCM", "Most recent value chosen", 224, 12301),
    "mean_chosen": _k("121412", "DCM", "Mean value chosen", 224, 12301),
    "mean": _k("373098007", "SCT", "Mean Value of population", 226),
    "mod_biplane": _k("125207", "DCM", "Method of Disks, Biplane", 12227),
    "area_length_biplane": _k("125204", "DCM", "Area-Length Biplane", 12227),
    "cardiac_rhythm": _k("8884-9", "LN", "Cardiac Rhythm", 3441),
}


def code(name: str) -> Code:
    return CODES[name].code


# the rule module's modifier names must be the ones declared here
for _alias, _names in MODIFIER_NAMES.items():  # pragma: no branch
    if _names[0] != CODES[_alias].code:  # pragma: no cover
        raise AssertionError(_alias)

#: CID sources cited beside rules
PS16 = "DICOM PS3.16"
SRC_12300 = f"{PS16} CID 12300 Core Echo Measurement (TID 5301 pre-coordinated)"
SRC_5200 = f"{PS16} TID 5200/5202 echo section concept"
SRC_POST = f"{PS16} TID 5200 generic concept (CID 12222) post-coordinated by modifiers"
SRC_5302 = f"{PS16} TID 5302 post-coordinated item, Measured Property (CID 12304) + modifiers"


def where(alias: str, *values: str, absent: bool = False, negate: bool = False) -> Condition:
    return Condition(
        key=alias,
        names=MODIFIER_NAMES[alias],
        values=tuple(code(v) for v in values),
        allow_absent=absent,
        negate=negate,
    )


SITE_MV = where("finding_site", "mitral_valve")
SITE_SEPTAL = where("finding_site", "medial_annulus")
SITE_LATERAL = where("finding_site", "lateral_annulus")
SITE_TV = where("finding_site", "tricuspid_valve")
SITE_PV = where("finding_site", "pulmonary_venous_structure", "pulmonary_vein")
SITE_LA = where("finding_site", "left_atrium")
SITE_LV = where("finding_site", "left_ventricle")
NOT_TDI = where("image_mode", "tdi", negate=True)
TDI_OR_NONE = where("image_mode", "tdi", absent=True)
E_PHASE_OR_NONE = where("cardiac_phase", "e_wave_phase", "early_diastole", absent=True)
E_PHASE = where("cardiac_phase", "e_wave_phase")
A_PHASE = where("cardiac_phase", "a_wave_phase")
S_PHASE = where("cardiac_phase", "s_wave_phase")
D_PHASE = where("cardiac_phase", "d_wave_phase")
#: backward flow: Regurgitant Flow (CID 12221) or Retrograde Flow (CID 12221; Retrograde
#: Direction in CID 12306, the value set of TID 5302's Flow Direction)
REGURGITANT = where("flow_direction", "regurgitant_flow", "retrograde_flow")
#: forward flow or no direction: a backward-flagged velocity at the mitral valve is mitral
#: regurgitation and one in the pulmonary veins is the atrial reversal (Ar) wave, never the
#: E, A, S or D wave
NOT_BACKWARD = where("flow_direction", "regurgitant_flow", "retrograde_flow", negate=True)
CW_OR_NONE = where("image_mode", "cw_doppler", absent=True)


def _rule(
    rid: str,
    concept: str | None,
    quantity: Measure | Component,
    *conditions: Condition,
    source: str,
    priority: int = 0,
    memory: bool = False,
) -> Rule:
    return Rule(
        id=rid,
        concept=None if concept is None else code(concept),
        quantity=quantity.value,
        conditions=conditions,
        origin=RuleOrigin.standard,
        priority=priority,
        source=source,
        from_memory=memory or any(CODES[n].from_memory for n in ([concept] if concept else [])),
    )


M, C = Measure, Component


def _mp(prop: str) -> Condition:
    return where("measured_property", prop)


#: priority: 0 = pre-coordinated (TID 5300), 1 = TID 5200 concept, 2 = generic post-coordinated
STANDARD_RULES: tuple[Rule, ...] = (
    # --- pre-coordinated, CID 12300 ---
    _rule("std.80070-6", "mv_e_vmax", M.mitral_e, source=SRC_12300),
    _rule("std.80066-4", "mv_a_vmax", M.mitral_a, source=SRC_12300),
    _rule("std.18038-0", "mv_e_a", M.e_a_ratio, source=SRC_12300),
    _rule("std.78191-4", "mv_dt", M.deceleration_time, source=SRC_12300),
    _rule("std.80065-6", "mv_a_dur", C.mitral_a_duration, source=SRC_12300),
    _rule("std.79911-4", "septal_e_prime", M.e_prime_septal, source=SRC_12300),
    _rule("std.80054-0", "lateral_e_prime", M.e_prime_lateral, source=SRC_12300),
    _rule("std.79921-3", "tr_vmax", M.tr_peak_velocity, source=SRC_12300),
    # LAVI: biplane method of disks preferred (common practice), then area-length
    _rule("std.79984-1", "lavi_mod", M.lavi, source=SRC_12300),
    _rule("std.79982-5", "lavi_al", M.lavi, source=SRC_12300, priority=1),
    # LVEF: biplane MOD preferred (common practice), then 3D, single-plane 4C, 2C
    _rule("std.79991-6", "lvef_mod", M.lvef, source=SRC_12300),
    _rule("std.79990-8", "lvef_3d", M.lvef, source=SRC_12300, priority=1),
    _rule("std.79993-2", "lvef_4c", M.lvef, source=SRC_12300, priority=2),
    _rule("std.79992-4", "lvef_2c", M.lvef, source=SRC_12300, priority=3),
    _rule("std.18071-1", "ivrt_doppler", M.ivrt, source=SRC_12300),
    _rule("std.80015-1", "ivrt_tdi", M.ivrt, source=SRC_12300, priority=1),
    _rule("std.79917-1", "pv_s_vmax", C.pv_s_velocity, source=SRC_12300),
    _rule("std.79916-3", "pv_d_vmax", C.pv_d_velocity, source=SRC_12300),
    _rule("std.78184-9", "pv_ar_dur", C.pv_ar_duration, source=SRC_12300),
    # --- TID 5200 section concepts (CID 12200-12220) ---
    _rule("std.18037-2", "mv_e_peak", M.mitral_e, source=SRC_5200, priority=1),
    _rule("std.17978-8", "mv_a_peak", M.mitral_a, source=SRC_5200, priority=1),
    _rule("std.399354002", "mv_dt_sct", M.deceleration_time, source=SRC_5200, priority=1),
    _rule("std.399229004", "mv_a_dur_sct", C.mitral_a_duration, source=SRC_5200, priority=1),
    _rule(
        "std.399133000.septal",
        "lv_e_prime",
        M.e_prime_septal,
        SITE_SEPTAL,
        source=SRC_5200 + " + Finding Site",
        priority=1,
    ),
    _rule(
        "std.399133000.lateral",
        "lv_e_prime",
        M.e_prime_lateral,
        SITE_LATERAL,
        source=SRC_5200 + " + Finding Site",
        priority=1,
    ),
    _rule(
        "std.399140004.septal",
        "e_over_e_prime_sct",
        M.e_e_prime_septal,
        SITE_SEPTAL,
        source=SRC_5200 + " + Finding Site",
        priority=1,
    ),
    _rule(
        "std.399140004.lateral",
        "e_over_e_prime_sct",
        M.e_e_prime_lateral,
        SITE_LATERAL,
        source=SRC_5200 + " + Finding Site",
        priority=1,
    ),
    # LVEF by US: the method (if any) is a significant modifier, grouped apart by the mapper
    _rule("std.18043-0", "lvef_us", M.lvef, source=SRC_5200, priority=4),
    # LA systolic volume: only the indexed value (unit mL/m2) is LAVI; a plain volume in mL
    # is excluded by the unit check
    _rule("std.399235004", "la_volume", M.lavi, source=SRC_5200, priority=2),
    _rule("std.29452-0", "pv_s_d", M.pv_s_d_ratio, source=SRC_5200, priority=1),
    _rule("std.29450-4", "pv_s_peak", C.pv_s_velocity, source=SRC_5200, priority=1),
    _rule("std.29451-2", "pv_d_peak", C.pv_d_velocity, source=SRC_5200, priority=1),
    _rule("std.399070007", "pv_ar_dur_sct", C.pv_ar_duration, source=SRC_5200, priority=1),
    # RVSP read as PASP (no RV outflow obstruction assumed; common practice)
    _rule("std.399023006", "rvsp", M.pasp, source=SRC_5200, priority=1),
    _rule("std.8867-4", "heart_rate", M.heart_rate, source=SRC_5200, priority=1),
    _rule("std.121033", "subject_age", M.age, source=f"{PS16} TID 1007 Subject Age"),
    # --- generic concepts post-coordinated by Finding Site (own or inherited) etc. ---
    _rule(
        "std.59080-2.mv", "e_wave_peak", M.mitral_e, SITE_MV, NOT_TDI, source=SRC_POST, priority=2
    ),
    # E-wave at an annulus site by TDI is e' (variant seen in exports; from memory)
    _rule(
        "std.59080-2.septal",
        "e_wave_peak",
        M.e_prime_septal,
        SITE_SEPTAL,
        TDI_OR_NONE,
        source=SRC_POST,
        priority=2,
        memory=True,
    ),
    _rule(
        "std.59080-2.lateral",
        "e_wave_peak",
        M.e_prime_lateral,
        SITE_LATERAL,
        TDI_OR_NONE,
        source=SRC_POST,
        priority=2,
        memory=True,
    ),
    _rule(
        "std.59081-0.mv", "a_wave_peak", M.mitral_a, SITE_MV, NOT_TDI, source=SRC_POST, priority=2
    ),
    _rule("std.59104-0.mv", "e_a_generic", M.e_a_ratio, SITE_MV, source=SRC_POST, priority=2),
    _rule(
        "std.20217-6.mv", "decel_time", M.deceleration_time, SITE_MV, source=SRC_POST, priority=2
    ),
    _rule(
        "std.20355-4.tr",
        "peak_blood_velocity",
        M.tr_peak_velocity,
        SITE_TV,
        REGURGITANT,
        CW_OR_NONE,
        source=SRC_POST,
        priority=2,
    ),
    _rule(
        "std.20355-4.mv.e",
        "peak_blood_velocity",
        M.mitral_e,
        SITE_MV,
        E_PHASE,
        NOT_BACKWARD,
        source=SRC_POST,
        priority=2,
    ),
    _rule(
        "std.20355-4.mv.a",
        "peak_blood_velocity",
        M.mitral_a,
        SITE_MV,
        A_PHASE,
        NOT_BACKWARD,
        source=SRC_POST,
        priority=2,
    ),
    _rule(
        "std.20355-4.pv.s",
        "peak_blood_velocity",
        C.pv_s_velocity,
        SITE_PV,
        S_PHASE,
        NOT_BACKWARD,
        source=SRC_POST,
        priority=2,
    ),
    _rule(
        "std.20355-4.pv.d",
        "peak_blood_velocity",
        C.pv_d_velocity,
        SITE_PV,
        D_PHASE,
        NOT_BACKWARD,
        source=SRC_POST,
        priority=2,
    ),
    _rule(
        "std.125330.septal",
        "peak_tissue_velocity",
        M.e_prime_septal,
        SITE_SEPTAL,
        E_PHASE_OR_NONE,
        source=SRC_POST,
        priority=2,
    ),
    _rule(
        "std.125330.lateral",
        "peak_tissue_velocity",
        M.e_prime_lateral,
        SITE_LATERAL,
        E_PHASE_OR_NONE,
        source=SRC_POST,
        priority=2,
    ),
    _rule(
        "std.59111-5.septal",
        "e_over_annulus_e",
        M.e_e_prime_septal,
        SITE_SEPTAL,
        source=SRC_POST,
        priority=2,
    ),
    _rule(
        "std.59111-5.lateral",
        "e_over_annulus_e",
        M.e_e_prime_lateral,
        SITE_LATERAL,
        source=SRC_POST,
        priority=2,
    ),
    _rule("std.12144-2.pv", "s_d_generic", M.pv_s_d_ratio, SITE_PV, source=SRC_POST, priority=2),
    _rule(
        "std.20167-3.mv",
        "accel_slope",
        M.e_acceleration_rate,
        SITE_MV,
        E_PHASE_OR_NONE,
        source=SRC_POST,
        priority=2,
    ),
    # --- TID 5302: any (usually private) row-1 code, meaning from Measured Property ---
    _rule(
        "std.mp125330.septal",
        None,
        M.e_prime_septal,
        _mp("peak_tissue_velocity"),
        SITE_SEPTAL,
        E_PHASE_OR_NONE,
        source=SRC_5302,
        priority=3,
    ),
    _rule(
        "std.mp125330.lateral",
        None,
        M.e_prime_lateral,
        _mp("peak_tissue_velocity"),
        SITE_LATERAL,
        E_PHASE_OR_NONE,
        source=SRC_5302,
        priority=3,
    ),
    _rule(
        "std.mp20355-4.mv.e",
        None,
        M.mitral_e,
        _mp("peak_blood_velocity"),
        SITE_MV,
        E_PHASE,
        NOT_BACKWARD,
        source=SRC_5302,
        priority=3,
    ),
    _rule(
        "std.mp20355-4.mv.a",
        None,
        M.mitral_a,
        _mp("peak_blood_velocity"),
        SITE_MV,
        A_PHASE,
        NOT_BACKWARD,
        source=SRC_5302,
        priority=3,
    ),
    _rule(
        "std.mp20355-4.tr",
        None,
        M.tr_peak_velocity,
        _mp("peak_blood_velocity"),
        SITE_TV,
        REGURGITANT,
        source=SRC_5302,
        priority=3,
    ),
    _rule(
        "std.mp20355-4.pv.s",
        None,
        C.pv_s_velocity,
        _mp("peak_blood_velocity"),
        SITE_PV,
        S_PHASE,
        NOT_BACKWARD,
        source=SRC_5302,
        priority=3,
    ),
    _rule(
        "std.mp20355-4.pv.d",
        None,
        C.pv_d_velocity,
        _mp("peak_blood_velocity"),
        SITE_PV,
        D_PHASE,
        NOT_BACKWARD,
        source=SRC_5302,
        priority=3,
    ),
    _rule(
        "std.mp20217-6.mv",
        None,
        M.deceleration_time,
        _mp("decel_time"),
        SITE_MV,
        source=SRC_5302,
        priority=3,
    ),
    # peak LA longitudinal strain is read as reservoir strain (common practice)
    _rule(
        "std.mp130671.la",
        None,
        M.la_reservoir_strain,
        _mp("peak_la_strain"),
        SITE_LA,
        source=SRC_5302,
        priority=3,
    ),
    _rule(
        "std.mp70822001.lv",
        None,
        M.lvef,
        _mp("ejection_fraction"),
        SITE_LV,
        source=SRC_5302,
        priority=5,
    ),
)
