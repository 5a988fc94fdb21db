"""Typed, frozen views of a loaded policy: one dataclass per section of ``policy.json``.

The fields mirror ``agent/contracts/schemas/policy.json`` (a test checks that they
agree); lists are tuples so that nothing in a loaded policy can be changed.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class PolicySection:
    """[policy] Identity and format version of the policy file."""

    schema: int
    name: str
    version: str
    description: str

@dataclass(frozen=True)
class StudySection:
    """[study] The study the policy belongs to."""

    study_id: str
    key_fingerprint: str
    consent_text: str
    contact: str
    default_timezone: str

@dataclass(frozen=True)
class ScheduleSection:
    """[schedule] What the recorders collect and how often."""

    audio_snippet_seconds: float
    audio_interval_minutes: float
    gps_interval_minutes: float
    accel_rate_hz: float
    accel_burst_seconds: float
    accel_interval_minutes: float
    mood_prompts_per_day: int
    emotions: tuple[str, ...]
    mood_scale_min: int
    mood_scale_max: int
    mood_present_at: int

@dataclass(frozen=True)
class RetentionSection:
    """[retention] How long anything may stay on the device."""

    raw_seconds: float
    settle_seconds: float
    feature_days: float
    gps_buffer_minutes: float
    quarantine: bool

@dataclass(frozen=True)
class IntakeSection:
    """[intake] How raw files are read and validated."""

    max_file_bytes: int
    audio_sr: int
    audio_length_tolerance_seconds: float
    accel_window_seconds: float
    accel_rate_tolerance: float
    gps_max_hdop: float
    gps_max_accuracy_m: float
    gps_max_speed_mps: float

@dataclass(frozen=True)
class CodebookSection:
    """[codebook] How features become coarse codes."""

    stay_radius_m: float
    stay_min_minutes: float
    place_radius_m: float
    place_min_stays: int
    sound_k_min: int
    sound_k_max: int
    motion_method: str
    motion_k: int
    refit_days: float

@dataclass(frozen=True)
class EpisodesSection:
    """[episodes] How hourly records are built."""

    mood_window_minutes: float

@dataclass(frozen=True)
class GraphSection:
    """[graph] The on-device co-occurrence graph."""

    nodes: tuple[str, ...]
    degree_cap: int
    cap_rule: str
    edge_weight: str
    type_quota: int

@dataclass(frozen=True)
class QuizSection:
    """[quiz] The memory test."""

    min_age_days: float
    max_age_days: float
    options: int
    foils: str
    trials_per_session: int
    seed: int

@dataclass(frozen=True)
class ModelSection:
    """[model] Model fitting."""

    folds: int
    restarts: int
    recovery_sims: int

@dataclass(frozen=True)
class ExportSection:
    """[export] What may leave the device and in what form."""

    allow: tuple[str, ...]
    include_edge_list: bool
    include_model: bool
    include_quiz_summary: bool
    cadence_days: float
    confirm_each: bool
    time_granularity: str
    small_cell_threshold: int
    small_cell_rule: str

@dataclass(frozen=True)
class PrivacySection:
    """[privacy] Differential privacy."""

    dp: bool
    epsilon_per_export: float
    epsilon_total: float
    unit: str


SECTION_TYPES: dict[str, type] = {
    "policy": PolicySection,
    "study": StudySection,
    "schedule": ScheduleSection,
    "retention": RetentionSection,
    "intake": IntakeSection,
    "codebook": CodebookSection,
    "episodes": EpisodesSection,
    "graph": GraphSection,
    "quiz": QuizSection,
    "model": ModelSection,
    "export": ExportSection,
    "privacy": PrivacySection,
}
