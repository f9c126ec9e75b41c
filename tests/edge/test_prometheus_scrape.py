"""README's scrape example against a real Prometheus: no ``exported_site`` label, ``site`` kept on the indicator
series and filled in from the target on the self-metrics.

Semantics relied on: with ``honor_labels: true`` label conflicts keep the scraped values and target labels are
attached only where the series lacks them (Prometheus documentation, "Configuration", scrape_config
``honor_labels``); without it the scraped label is renamed ``exported_<name>``.
"""

from __future__ import annotations

import http.server
import json
import re
import shutil
import subprocess
import textwrap
import threading
import time
import urllib.parse
import urllib.request
from pathlib import Path
from typing import Any

import pytest

from tests.servers import free_port, wait_port

REPO = Path(__file__).resolve().parents[2]
PROMETHEUS = shutil.which("prometheus")

pytestmark = [pytest.mark.network, pytest.mark.skipif(PROMETHEUS is None, reason="apt-get install prometheus")]

EXPOSITION = (
    "# HELP edgevib_kurtosis Pearson kurtosis of acceleration\n# TYPE edgevib_kurtosis gauge\n"
    'edgevib_kurtosis{site="quarry-lane",machine="P-101",point="P-101-DE-H",axis="horizontal"} 3.1\n'
    "# HELP edgevib_blocks_received_total Blocks received\n# TYPE edgevib_blocks_received_total counter\n"
    'edgevib_blocks_received_total{source="station-broker"} 42\n'
)


def _readme_scrape_job() -> str:
    """The scrape_configs block of README's section on metrics over TLS (job ``edgevib``)."""
    text = (REPO / "README.md").read_text()
    for block in re.findall(r"```yaml\n(.*?)\n *```", text, re.S):
        if "job_name: edgevib\n" in block:
            return textwrap.dedent(block)
    raise AssertionError("README has no scrape example for job edgevib")


def _local_variant(block: str) -> str:
    """The example pointed at a plain-HTTP target on loopback (TLS is not what is checked here)."""
    out: list[str] = []
    tls_indent: int | None = None
    for line in block.splitlines():
        indent = len(line) - len(line.lstrip())
        if tls_indent is not None and indent > tls_indent:
            continue  # a key of tls_config
        tls_indent = None
        if line.strip().startswith("tls_config:"):
            tls_indent = indent
            continue
        if line.strip().startswith("scheme:"):
            continue
        out.append(re.sub(r'targets: \[".*?"\]', 'targets: ["127.0.0.1:TARGET_PORT"]', line))
    return "global:\n  scrape_interval: 1s\n" + "\n".join(out) + "\n"


class _Handler(http.server.BaseHTTPRequestHandler):
    def do_GET(self) -> None:
        body = EXPOSITION.encode()
        self.send_response(200)
        self.send_header("Content-Type", "text/plain; version=0.0.4")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, *args: Any) -> None:
        pass


def _series(prom_port: int, n: int, deadline_s: float = 30.0) -> list[dict[str, str]]:
    query = urllib.parse.urlencode({"match[]": '{__name__=~"edgevib_.*"}'})
    end = time.monotonic() + deadline_s
    while time.monotonic() < end:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{prom_port}/api/v1/series?{query}", timeout=2) as r:
                data = json.load(r)["data"]
            if len(data) >= n:
                return list(data)
        except OSError:
            pass
        time.sleep(0.3)
    raise AssertionError("Prometheus scraped nothing within the deadline")


def _scrape_with(config: str, tmp: Path, n: int) -> list[dict[str, str]]:
    target = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _Handler)
    threading.Thread(target=target.serve_forever, daemon=True).start()
    prom_port = free_port()
    (tmp / "prometheus.yml").write_text(config.replace("TARGET_PORT", str(target.server_address[1])))
    assert PROMETHEUS is not None
    proc = subprocess.Popen([PROMETHEUS, f"--config.file={tmp / 'prometheus.yml'}",
                             f"--storage.tsdb.path={tmp / 'data'}", f"--web.listen-address=127.0.0.1:{prom_port}"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        wait_port(prom_port, 30.0)
        return _series(prom_port, n)
    finally:
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)
        target.shutdown()
        target.server_close()


def test_readme_scrape_example_keeps_site_label(tmp_path: Path) -> None:
    """One Prometheus, two jobs on the same target: README's, and the same without honor_labels (the check can
    fail: that one does produce exported_site)."""
    block = _readme_scrape_job()
    assert "honor_labels: true" in block
    readme = _local_variant(block)
    jobs = readme.split("scrape_configs:\n", 1)[1]
    plain = jobs.replace("honor_labels: true", "honor_labels: false").replace("job_name: edgevib", "job_name: plain")
    series = _scrape_with(readme + plain, tmp_path, n=4)
    ours = {s["__name__"]: s for s in series if s["job"] == "edgevib"}
    assert all("exported_site" not in s for s in ours.values()), series
    assert ours["edgevib_kurtosis"]["site"] == "quarry-lane"
    assert ours["edgevib_blocks_received_total"]["site"] == "quarry-lane"  # from the target label
    other = {s["__name__"]: s for s in series if s["job"] == "plain"}
    assert other["edgevib_kurtosis"].get("exported_site") == "quarry-lane"
