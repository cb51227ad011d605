"""`veer top` and `veer report` against a real veerd.

top: run live inside a tmux session (tmux new-session -d; capture-pane), its frame must show
the channels and tasks the test switched, the act count, the per-stage percentiles that
prometheus_client's independent parser reads from the same /metrics, and the drifted feature
highlighted as an alarm (ANSI SGR bold red, ECMA-48).
report: the SVG parses as XML (xml.etree), has the expected groups, its latency histogram holds
as many requests as the recording's counters say were made during it (read back with
prometheus_client), and the switch made during the recording is marked."""
import os
import re
import subprocess
import time
import xml.etree.ElementTree as ET

import numpy as np
import pytest

import harness
from metrics_text import scrape, value
from prometheus_client.parser import text_string_to_metric_families

VEER = os.path.join(harness.BUILD, "bin", "veer")
SVG = "{http://www.w3.org/2000/svg}"


def drive(svc, s, n=600, far_feature=None):
    c = svc.c
    for i in range(n):
        st = s[i % len(s)].copy()
        if far_feature is not None:
            st[far_feature] += 40.0
        r = c.do_act("arm", st, seq=i, deadline_us=100000)
        assert r.WhichOneof("body") == "act"


def start_with_tasks(bundle, start):
    """veerd with tasks "pick" and "place" stored and channel arm switched to pick."""
    svc = start(bundle)
    s, c = bundle.states, svc.c
    c.put_samples("pick", s[:20], np.arange(20, dtype=np.float32))
    c.put_samples("place", s[:20], -np.arange(20, dtype=np.float32))
    c.switch("arm", "pick")
    return svc, s, c


def histogram_quantile(samples, name, q, **labels):
    """Quantile from cumulative buckets, interpolated linearly within the bucket where the rank
    falls (the method of Prometheus's histogram_quantile, from its documentation)."""
    buckets = sorted((float(dict(k)["le"]), v) for k, v in samples[name + "_bucket"].items()
                     if all(dict(k).get(a) == b for a, b in labels.items()))
    rank = q * buckets[-1][1]
    lower, below = 0.0, 0.0
    for le, cum in buckets:
        if cum >= rank:
            if le == float("inf"):
                return lower
            return lower + (le - lower) * ((rank - below) / (cum - below) if cum > below else 1.0)
        lower, below = le, cum
    return buckets[-1][0]


def fmt_duration(seconds):
    """The CLI's duration format (clients/c/cli/cli_metrics.c), applied to the parser's value."""
    if seconds < 1e-6:
        return f"{seconds * 1e9:.0f}ns"
    if seconds < 1e-3:
        return f"{seconds * 1e6:.1f}us"
    if seconds < 1:
        return f"{seconds * 1e3:.2f}ms"
    return f"{seconds:.2f}s"


def test_top_in_tmux_shows_the_expected_fields(continuous_bundle, start, tmp_path):
    svc, s, c = start_with_tasks(continuous_bundle, start)
    c.switch("lift", "place")
    drive(svc, s, 1200, far_feature=3)  # a full drift window with feature 3 far out
    samples, _ = scrape(svc.url)
    acts = int(value(samples, "veer_acts_total"))
    names = sorted({dict(k)["feature"] for k in samples["veer_drift_psi"]})
    far = [n for n in names if value(samples, "veer_drift_psi_level", scope="service", feature=n) == 2]
    assert value(samples, "veer_drift_level", scope="service") == 2 and far

    sock = f"veer-ops-{os.getpid()}"
    session = "top"
    cmd = f"{VEER} top --http 127.0.0.1:{svc.http_port} --interval 1 --color always"
    subprocess.run(["tmux", "-L", sock, "new-session", "-d", "-s", session, "-x", "160", "-y", "70", cmd],
                   check=True, timeout=20)
    try:
        # A capture can land while tmux is still drawing a frame (seen in CI: a feature row cut
        # before its LEVEL column), so wait for two captures in a row that agree once the
        # header's clock is blanked: nothing moves after drive() returns, so that is a whole frame.
        screen, last = "", None
        end = time.monotonic() + 20
        while time.monotonic() < end:
            time.sleep(0.4)
            screen = subprocess.run(["tmux", "-L", sock, "capture-pane", "-p", "-e", "-t", session],
                                    capture_output=True, text=True, timeout=10).stdout
            still = re.sub(r"\b\d\d:\d\d:\d\d\b", "", screen)
            if "FEATURE" in screen and still == last:
                break
            last = still
    finally:
        subprocess.run(["tmux", "-L", sock, "kill-server"], timeout=10)
    plain = re.sub(r"\x1b\[[0-9;]*[A-Za-z]", "", screen)
    assert "veer top" in plain and "model continuous-random" in plain and "ready" in plain, plain
    assert re.search(rf"\bacts {acts}\b", plain), plain
    row = re.search(r"^arm\s+pick\s+[-0-9.nan]+\s+1200\s+1\s+(\S+)\s+(\S+)$", plain, re.M)
    assert row, plain
    assert row.group(1) == fmt_duration(histogram_quantile(samples, "veer_channel_act_seconds", 0.99, channel="arm"))
    # The channel's own exceedance rate, "!" once its alarm is raised (feature 3 is far out).
    rate = value(samples, "veer_drift_exceed_rate", scope="channel", channel="arm")
    assert value(samples, "veer_drift_exceed_level", scope="channel", channel="arm") == 2
    assert row.group(2) == f"{100 * rate:.1f}%!", (row.group(2), rate)
    # lift never acted: no drift monitor of its own yet.
    assert re.search(r"^lift\s+place\s+.*\s-$", plain, re.M), plain
    # The percentiles shown equal what an independent parser reads, formatted the CLI's way.
    for stage in ("decode", "policy", "reply", "total"):
        row = re.search(rf"^{stage}\s+(\d+)\s+(\S+)\s+(\S+)\s+(\S+)\s+(\S+)\s+(\S+)$", plain, re.M)
        assert row, (stage, plain)
        assert int(row.group(1)) == value(samples, "veer_act_stage_recent_count", stage=stage)
        want = [fmt_duration(value(samples, "veer_act_stage_recent_seconds", stage=stage, quantile=q))
                for q in ("0.5", "0.9", "0.99", "0.999", "1")]
        assert list(row.groups()[1:]) == want, (stage, row.groups(), want)
    assert "total time" in plain and "|#" in plain  # the histogram is drawn
    # The drifted feature's row says ALARM and is drawn bold red.
    for name in far:
        line = next(l for l in screen.splitlines() if re.sub(r"\x1b\[[0-9;]*m", "", l).startswith(name + " "))
        # tmux re-emits SGR 1;31 as two sequences
        assert "ALARM" in line and ("\x1b[1;31m" in line or ("\x1b[1m" in line and "\x1b[31m" in line)), repr(line)
    ok_rows = [l for l in screen.splitlines() if l.rstrip().endswith(" ok") and "\x1b[31m" not in l]
    assert len(ok_rows) >= 1  # undrifted features are not red
    assert re.search(r"drift\s+\S*level ALARM", plain), plain


def test_top_once_and_unreachable(continuous_bundle, start):
    svc = start(continuous_bundle)
    p = subprocess.run([VEER, "top", "--once", "--interval", "0.2", "--http", f"127.0.0.1:{svc.http_port}"],
                       capture_output=True, text=True, timeout=30)
    assert p.returncode == 0, p.stderr
    assert "\x1b" not in p.stdout  # not a terminal: no colour
    assert "(no channel yet" in p.stdout and "STAGE" in p.stdout
    closed = harness.free_port()
    p = subprocess.run([VEER, "top", "--once", "--http", f"127.0.0.1:{closed}", "--timeout-ms", "500"],
                       capture_output=True, text=True, timeout=30)
    assert p.returncode == 4 and "cannot connect" in p.stderr
    p = subprocess.run([VEER, "top", "--interval", "0"], capture_output=True, text=True, timeout=30)
    assert p.returncode == 2 and "--interval" in p.stderr


def frames(path):
    text = open(path).read()
    parts = text.split("#@frame ")[1:]
    out = []
    for part in parts:
        stamp, _, body = part.partition("\n")
        fams = {}
        for fam in text_string_to_metric_families(body):
            for smp in fam.samples:
                fams[(smp.name, frozenset(smp.labels.items()))] = smp.value
        out.append((int(stamp), fams))
    return out


def test_report_writes_a_valid_svg(continuous_bundle, start, tmp_path):
    svc, s, c = start_with_tasks(continuous_bundle, start)
    rec, page = tmp_path / "rec.txt", tmp_path / "page.svg"
    proc = subprocess.Popen([VEER, "report", "--http", f"127.0.0.1:{svc.http_port}", "--seconds", "4",
                             "--interval", "0.5", "--record", str(rec), "-o", str(page)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(1.0)
    drive(svc, s, 300)
    c.switch("arm", "place")
    drive(svc, s, 300)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    assert "written to" in out

    root = ET.parse(page).getroot()
    assert root.tag == SVG + "svg"
    ids = {g.get("id") for g in root.iter(SVG + "g") if g.get("id")}
    assert {"latency-histograms", "latency-decode", "latency-policy", "latency-reply", "latency-total",
            "latency-over-time", "act-rate", "drift-over-time", "exceedance-over-time", "switches"} <= ids
    assert not [e for e in root.iter() if e.tag.endswith("script")]  # self-contained, no script

    recorded = frames(rec)
    assert 7 <= len(recorded) <= 10
    first, last = recorded[0][1], recorded[-1][1]
    made = last[("veer_act_stage_seconds_count", frozenset({("stage", "total")}))] - \
        first[("veer_act_stage_seconds_count", frozenset({("stage", "total")}))]
    assert made == 600
    total = next(g for g in root.iter(SVG + "g") if g.get("id") == "latency-total")
    bars = [int(t.text.split(": ")[1]) for t in total.iter(SVG + "title")]
    assert sum(bars) == made
    switches = next(g for g in root.iter(SVG + "g") if g.get("id") == "switches")
    labels = [t.text for t in switches.iter(SVG + "text")]
    assert labels == ["switch +1: arm -> place"], labels
    assert len(list(switches.iter(SVG + "line"))) == 1

    # The same recording read back gives the same page but for the source named in the header.
    again = tmp_path / "again.svg"
    p = subprocess.run([VEER, "report", "--from", str(rec), "-o", str(again)], capture_output=True, text=True,
                       timeout=30)
    assert p.returncode == 0, p.stderr
    strip = lambda b: re.sub(r"\(.*?\)\. Switch", "", b)  # noqa: E731
    assert strip(again.read_text()) == strip(page.read_text())


@pytest.mark.parametrize("content, why", [("", "not a veer report recording"),
                                          ("#@frame 12\nveer_acts_total{ 1\n", "frame 1"),
                                          ("#@frame x\n", "no time")])
def test_report_refuses_bad_recordings(tmp_path, content, why):
    bad = tmp_path / "bad.txt"
    bad.write_text(content)
    p = subprocess.run([VEER, "report", "--from", str(bad), "-o", str(tmp_path / "x.svg")], capture_output=True,
                       text=True, timeout=30)
    assert p.returncode == 3 and why in p.stderr, p.stderr
    assert not (tmp_path / "x.svg").exists()
