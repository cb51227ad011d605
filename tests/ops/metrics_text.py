"""Reading veerd's /metrics with an independent parser: Debian's python3-prometheus-client
(prometheus_client.parser.text_string_to_metric_families, the reference implementation of the
text exposition format 0.0.4)."""
import urllib.request

from prometheus_client.parser import text_string_to_metric_families


def get(url, timeout=10):
    with urllib.request.urlopen(url, timeout=timeout) as r:
        return r.status, r.headers, r.read().decode()


def scrape(base):
    """{sample name: {frozenset(labels.items()): value}} and the families by name."""
    status, headers, text = get(base + "/metrics")
    assert status == 200
    assert headers["Content-Type"].startswith("text/plain; version=0.0.4")
    samples, families = {}, {}
    for fam in text_string_to_metric_families(text):
        families[fam.name] = fam
        for s in fam.samples:
            samples.setdefault(s.name, {})[frozenset(s.labels.items())] = s.value
    return samples, families


def value(samples, name, **labels):
    return samples[name][frozenset(labels.items())]
