"""Made the frozen version-1 ledger fixture in tests/data/ledger-v1/ with lethe at main bdc165f
(entry version 1, sorted-key JSON hashed).  Kept here for the record; not re-run."""
import hashlib
import sys
from pathlib import Path
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from cryptography.hazmat.primitives import serialization
from agent.ledger import Ledger, ENTRY_VERSION
assert ENTRY_VERSION == 1
out = Path(sys.argv[1])
SEED = hashlib.sha256(b"lethe ledger v1 fixture (a test key, not a secret)").digest()
key = Ed25519PrivateKey.from_private_bytes(SEED)
T0 = 1_790_000_000.0
t = [T0]
def clock():
    t[0] += 0.5
    return t[0]
lg = Ledger(out / "ledger.jsonl", key, clock=clock)
it = "0123456789abcdef0123456789abcdef"
lg.append("agent_start", version="0.1.0")
lg.append("policy", fingerprint="ab" * 32, name="default", version="1")
lg.append_many([("received", dict(item=it, kind="audio", bytes=96044, complete_at=T0)),
                ("featurised", dict(item=it, kind="audio", rows=1))])
lg.append("destroyed", item=it, kind="audio", complete_at=T0, exposure_s=2.0)
lg.append("agent_stop", reason="signal")
pub = key.public_key().public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw).hex()
(out / "device.pub").write_text(pub + "\n")
