"""Screenshot of the researcher's dashboard at 1,000 participants: python docs/gen_dashboard_figure.py OUT.png

A throw-away study with 1,000 enrolled devices, 40 of them withdrawn and 60
overdue; their latest-bundle rows are written straight into the server's
database (fictional numbers, for the figure only; real uploads go through the
API and its verification).  The page is rendered by the real server and
photographed in headless Chromium.
"""

import json
import random
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from _bundle_fixtures import PASS, Study, make_payload  # noqa: E402
from agent.study.server.app import ServerSettings  # noqa: E402
from agent.study.server.run import ServerThread  # noqa: E402
from agent.study.server.store import bundles_t, devices_t, withdrawals_t  # noqa: E402

out = Path(sys.argv[1] if len(sys.argv) > 1 else "docs/figures/dashboard-1000.png").absolute()
tmp = Path(tempfile.mkdtemp(prefix="lethe-dash-"))
s = Study(tmp)
srv = ServerThread(s.dir, PASS, ServerSettings("figure-password", secure_cookies=True)).start()
rng = random.Random(1)
base = make_payload(s.policy)
devs, bundles, wds = [], [], []
for i in range(1000):
    name = f"p{i:04d}x"
    p = json.loads(json.dumps(base))
    p["model"]["cv"]["pooled"]["agreement"] = round(min(1, max(0, rng.gauss(0.55, 0.08))), 3)
    for b, mu in (("frequency", 0.47), ("chance", 0.25)):
        p["model"]["baselines"][b]["agreement"] = round(min(1, max(0, rng.gauss(mu, 0.07))), 3)
    p["model"]["params"]["beta"] = round(rng.lognormvariate(0.5, 0.4), 3)
    for k in p["model"]["params"]["theta"]:
        p["model"]["params"]["theta"][k] = round(rng.lognormvariate(-0.5, 0.5), 3)
    p["counts"]["hours"] = int(rng.gauss(300, 60))
    p["ledger_digest"]["max_exposure_s"] = round(rng.lognormvariate(0.6, 0.3), 2)
    late = i % 16 == 0
    at = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(time.time() - (12 if late else 1) * 86400))
    devs.append({"pseudonym": name, "device_key_id": f"{i:016x}", "public_key": i.to_bytes(32, "big"),
                 "policy_fingerprint": p["policy_fingerprint"], "enrolled": "2026-11-01", "enrolled_at": at,
                 "withdrawn": "2026-11-20T10:00Z" if i % 25 == 0 else None, "log_origin": None})
    bundles.append({"pseudonym": name, "seq": 1, "sha256": f"{i:064x}", "created": p["created"], "received_at": at,
                    "header": "{}", "payload": json.dumps(p)})
    if i % 25 == 0:
        wds.append({"pseudonym": name, "time": "2026-11-20T10:00Z", "received_at": at, "certificate": "{}"})
with srv.ctx.store.write() as c:
    c.execute(devices_t.insert(), devs)
    c.execute(bundles_t.insert(), bundles)
    c.execute(withdrawals_t.insert(), wds)
srv.ctx.store.invite(1100)  # invitations handed out (the rows above bypass enrolment: figure only)

from selenium import webdriver  # noqa: E402
from selenium.webdriver.chrome.service import Service  # noqa: E402
from selenium.webdriver.common.by import By  # noqa: E402
from selenium.webdriver.support.ui import WebDriverWait  # noqa: E402

opts = webdriver.ChromeOptions()
opts.binary_location = "/usr/bin/chromium"
for a in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
          "--disable-background-networking", "--disable-component-update", "--disable-sync",
          f"--user-data-dir={tmp / 'chromium'}", "--window-size=1100,2700", "--ignore-certificate-errors"):
    opts.add_argument(a)
drv = webdriver.Chrome(service=Service("/usr/bin/chromedriver"), options=opts)
try:
    drv.get(srv.url + "/login")
    drv.find_element(By.ID, "password").send_keys("figure-password")
    drv.find_element(By.ID, "login").click()
    WebDriverWait(drv, 120).until(lambda d: d.find_elements(By.ID, "n-enrolled"))
    WebDriverWait(drv, 120).until(lambda d: all(
        d.execute_script("return arguments[0].complete && arguments[0].naturalWidth", i)
        for i in d.find_elements(By.TAG_NAME, "img")))
    drv.save_screenshot(str(out))
finally:
    drv.quit()
    srv.stop()
print(out)
