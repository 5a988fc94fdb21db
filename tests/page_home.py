"""A real enrolled home with three weeks of hourly codes, for the participant page tests.

The episodes are written straight into the vault (as the codebook would) so the
tests need no simulated recorder; local fields come from zoneinfo.
"""

from __future__ import annotations

from card_pin import card_fingerprint  # the participant confirms the study key (issue 12, finding 8)
import time
from datetime import datetime, timedelta, UTC
from pathlib import Path
from zoneinfo import ZoneInfo

REPO = Path(__file__).resolve().parent.parent
STUDY_ID = "harbour-days-2027"
TZ = "Europe/Lisbon"


def _place(local: datetime) -> str:
    # a plain week: home at night, work on weekday office hours, a café some evenings, a park on weekends
    if 9 <= local.hour < 17 and local.weekday() < 5:
        return "P2"
    if 17 <= local.hour < 19 and local.weekday() in (1, 3):
        return "P3"
    if 10 <= local.hour < 13 and local.weekday() >= 5:
        return "P4"
    return "P1"


SOUND = {"P1": "S1", "P2": "S2", "P3": "S3", "P4": "S4"}
MOTION = {"P1": "sedentary", "P2": "sedentary", "P3": "light", "P4": "mvpa"}


def make_page_home(tmp: Path, days: int = 21) -> Path:
    from agent.home import Home
    from agent.participant.enrol import enrol
    from agent.study.card import write_card
    from agent.study.keys import study_keygen
    from agent.vault import Vault

    study = tmp / "study"
    study_keygen(study, STUDY_ID, b"test passphrase", scrypt_n=2**10)
    card = write_card(study, [REPO / "policies" / "default.toml"], contact="test desk", out=tmp / "card.json")
    now = time.time()
    root = tmp / "ph"
    enrol(root, card, REPO / "policies" / "default.toml", consent=STUDY_ID, timezone=TZ, now=now - days * 86400,
          confirm_fingerprint=card_fingerprint(card))
    zone = ZoneInfo(TZ)
    start = datetime.fromtimestamp(now - days * 86400, UTC).replace(minute=0, second=0, microsecond=0)
    eps = []
    for h in range(days * 24 - 12):
        u = start + timedelta(hours=h)
        loc = u.astimezone(zone)
        pid = _place(loc)
        eps.append((loc.isoformat(timespec="minutes"), {
            "key": loc.isoformat(timespec="minutes"), "utc": u.timestamp(), "date": loc.date().isoformat(),
            "hour": loc.hour, "weekday": loc.weekday(), "week": 1 + h // (24 * 7), "place": pid,
            "sound": SOUND[pid], "motion": MOTION[pid], "moods": [], "coverage": {}}))
    with Vault.open(Home(root)) as v:
        v.put_many("episodes", eps)
    return root
