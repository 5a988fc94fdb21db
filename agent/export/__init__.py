"""What leaves the device: the payload builder, its plain-words preview, and the export flow.

:mod:`.payload` builds the payload from the home under the policy's allowlist
and checks it against ``agent/contracts/schemas/payload.json``; :mod:`.preview`
words it for the participant; :mod:`.flow` confirms, seals, signs and writes
the bundle (the container format is :mod:`agent.bundle`).
"""

from __future__ import annotations

from .flow import export_bundle, home_card, next_seq
from .payload import (PAYLOAD_SCHEMA, Relabeller, build_payload, build_payload_and_relabel, coarse_date,
                      edge_list_from, payload_from_parts, project_fit, project_quiz, validate_payload)
from .preview import preview

__all__ = ["PAYLOAD_SCHEMA", "Relabeller", "build_payload", "build_payload_and_relabel", "coarse_date",
           "edge_list_from", "export_bundle", "home_card", "next_seq", "payload_from_parts", "preview",
           "project_fit", "project_quiz", "validate_payload"]
