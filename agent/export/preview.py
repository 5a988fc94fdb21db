"""The plain-words preview of a payload: exactly what would leave the device."""

from __future__ import annotations

import re
from collections.abc import Mapping

from .payload import RELABELLED

_KIND_WORDS = {"hour": "hour of day", "weekday": "weekday", "week": "study week", "place": "place",
               "sound": "kind of soundscape", "motion": "activity level", "mood": "mood"}


def preview(payload: Mapping) -> str:
    """Plain-language description of exactly what the payload holds."""
    L = []
    L.append(f"This export would send the study {payload['study_id']!r} the following, sealed so that only "
             f"the study can read it and signed by this device:")
    L.append(f"  * Date: {payload['created']} (to the {payload['time_granularity']}, nothing finer).")
    L.append(f"  * The study policy it was collected under: {payload['policy_fingerprint'][:16]}…, "
             f"lethe {payload['software_version']}.")
    c = payload["counts"]
    # Follow the policy's kind order, not the dict order (the sealed form has sorted keys).
    rank = {k: i for i, k in enumerate(payload["kinds"])}

    def pair_rank(key):
        a, _, b = key.partition("|")
        return (rank.get(a, 99), rank.get(b, 99)) if b else (100, 100)

    shown = {k: c["pairs"][k] for k in sorted(c["pairs"], key=pair_rank) if c["pairs"][k] is not None}
    L.append(f"  * How many hours two kinds of thing occurred together ({len(c['pairs'])} numbers):")
    for k, v in shown.items():
        if k == "other":
            L.append(f"      all the small pairs together: {v}")
            continue
        a, b = k.split("|")
        L.append(f"      {_KIND_WORDS[a]} with {_KIND_WORDS[b]}: {v}")
    if c["suppressed"]:
        L.append(f"    Withheld because below {c['small_cell_threshold']}: "
                 + ", ".join(k.replace("|", " with ") for k in sorted(c["suppressed"], key=pair_rank)) + ".")
    if c["merged"] and c["pairs"].get("other") is not None:
        L.append("    Pooled into 'all the small pairs together': "
                 + ", ".join(k.replace("|", " with ") for k in sorted(c["merged"], key=pair_rank)) + ".")
    L.append(f"  * Hours observed: {c['hours']} ("
             + ", ".join(f"{_KIND_WORDS[k]} known in {c['hours_by_kind'][k]}"
                         for k in sorted(c["hours_by_kind"], key=lambda k: rank.get(k, 99))) + ").")
    if c["dp"]:
        d = c["dp"]
        L.append(f"    These numbers carry random noise (differential privacy, epsilon {d['epsilon']:g} "
                 f"per {d['unit']}-level protection, noise scale {d['scale']:g}). Each preview draws new "
                 f"noise; the preview you confirm during an export is exactly what is sealed.")
    e = payload["edge_list"]
    if e is not None:
        relab = sorted({n.split(":")[0] for n in e["nodes"]} & set(RELABELLED))
        L.append(f"  * A list of {len(e['edges'])} links among {len(e['nodes'])} items (hours, weekdays, weeks, "
                 f"places, sounds, activity, moods), at most {e['degree_cap']} links per item; "
                 + (", ".join(relab) + " ids are replaced by random codes that mean nothing outside this "
                    "device." if relab else "no place, sound or activity ids."))
    m = payload["model"]
    if m is not None:
        names = sorted({re.sub(r"_(k|ci_low|ci_high)$", "", k) for k in m["cv"]["pooled"]} - {"n", "n_days"})
        L.append(f"  * The memory model fitted on this device: {len(m['params']['theta'])} weights, "
                 f"its cross-validated scores ({', '.join(names) or 'none'}, with 95% intervals) "
                 f"and the same scores for {len(m['baselines'])} comparison baselines.")
    q = payload["quiz"]
    if q is not None:
        acc = "no answers yet" if q["accuracy"] is None else f"{100 * q['accuracy']:.0f}% correct"
        ch = "" if q["chance"] is None else f" (guessing: {100 * q['chance']:.0f}%)"
        L.append(f"  * Memory test summary: {q['trials']} questions, {q['answered']} answered, {acc}{ch}.")
    g = payload["ledger_digest"]
    mx = g.get("max_exposure_s")
    L.append("  * The audit log's summary: event counts, "
             + (f"the longest time a raw file existed ({mx:.1f} s), " if mx is not None else "")
             + f"{g['violations']} retention violation(s), and the log's last entry #{g['head']['seq']}.")
    for k, why in sorted(payload["withheld"].items()):
        L.append(f"  * Not sent: {k.replace('_', ' ')} — {why}.")
    L.append("Never sent: locations or coordinates, place names, sound recordings or sound features, "
             "exact times, your answers one by one.")
    return "\n".join(L)
