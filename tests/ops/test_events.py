"""Events of a scripted sequence, in order, including a burst of deadline misses (this area's
addition; tests/service/test_veerd_events.py covers each other kind on its own). A burst is at
least 10 misses within 1 s (src/service/ops.c defaults); a 1 us deadline cannot be met, so every
act below misses it."""
import time

import numpy as np

import harness
from metrics_text import scrape, value
from test_veerd_events import events as receive  # tests/service, on the path by conftest.py
from test_veerd_events import subscriber


def test_scripted_sequence_with_a_deadline_burst(continuous_bundle, start):
    svc = start(continuous_bundle)
    c, s = svc.c, continuous_bundle.states
    sub = subscriber(svc.d.eps)
    only_deadline = subscriber(svc.d.eps, b"veer.deadline")
    c.put_samples("pick", s[:20], np.arange(20, dtype=np.float32))
    c.switch("arm", "pick")
    missed = 0
    for i in range(30):
        r = c.do_act("arm", s[i], seq=i, deadline_us=1)
        missed += bool(r.act.flags & harness.ACT_DEADLINE)
    assert missed == 30
    time.sleep(0.6)  # the burst detector samples every 100 ms
    c.put_samples("place", s[:20], -np.arange(20, dtype=np.float32))
    c.switch("arm", "place")
    c.drop("pick")
    got = receive(sub, 6)
    assert [t for t, _ in got] == ["veer.task", "veer.switch", "veer.deadline", "veer.task", "veer.switch",
                                   "veer.task"]
    ev = [e for _, e in got]
    seqs = [e.seq for e in ev]
    assert seqs == list(range(seqs[0], seqs[0] + 6))
    burst = ev[2].deadline_burst
    assert 10 <= burst.misses <= 30 and burst.window_s == 1.0 and burst.channel == ""
    assert ev[0].task_stored.name == "pick" and ev[5].task_dropped.name == "pick"
    assert (ev[4].switched.from_task, ev[4].switched.to_task, ev[4].switched.epoch) == ("pick", "place", 2)
    # A prefix subscription sees the burst alone; the counter and the log agree.
    only = receive(only_deadline, 1)
    assert len(only) == 1 and only[0][0] == "veer.deadline" and only[0][1].seq == ev[2].seq
    assert not only_deadline.poll(300)
    sub.close()
    only_deadline.close()
    samples, _ = scrape(svc.url)
    assert value(samples, "veer_deadline_bursts_total") == 1
    assert value(samples, "veer_act_deadline_misses_total") == 30
    assert "deadline: " in svc.d.log() and "misses within 1.0 s" in svc.d.log()
