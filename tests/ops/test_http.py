"""veerd's HTTP endpoint under bad and hostile requests, over real TCP sockets: each gets the
status code RFC 9110 / RFC 6585 assign (400 malformed, 505 an HTTP version other than 1.x, 404 unknown path, 405 other methods with
an Allow header, 408 a request not completed in time, 413 a body too large, 431 header fields
too large, 503 over the connection limit), and afterwards the service still answers acts and
/metrics. Every wait is bounded."""
import socket
import subprocess
import time

import numpy as np

import harness
from metrics_text import get, scrape, value

REQUEST_TIMEOUT_S = 5.0  # src/service/http.c default request timeout


def exchange(port, data: bytes, wait=10.0):
    """Sends raw bytes, reads until the server closes or `wait` passes; returns the response."""
    with socket.create_connection(("127.0.0.1", port), timeout=wait) as s:
        s.sendall(data)
        return read_response(s, wait)


def read_response(s, wait):
    s.settimeout(wait)
    out = b""
    end = time.monotonic() + wait
    while time.monotonic() < end:
        try:
            chunk = s.recv(65536)
        except socket.timeout:
            break
        except ConnectionResetError:
            break
        if not chunk:
            break
        out += chunk
        if b"\r\n\r\n" in out:
            head, _, body = out.partition(b"\r\n\r\n")
            length = [int(l.split(b":")[1]) for l in head.split(b"\r\n") if l.lower().startswith(b"content-length:")]
            if length and len(body) >= length[0]:
                break
    return out


def status_of(resp: bytes) -> int:
    assert resp.startswith(b"HTTP/1.1 "), resp[:200]
    return int(resp.split(b" ")[1])


def headers_of(resp: bytes) -> dict:
    head = resp.partition(b"\r\n\r\n")[0].decode()
    return {l.split(":", 1)[0].lower(): l.split(":", 1)[1].strip() for l in head.split("\r\n")[1:]}


def still_serving(svc, s):
    r = svc.c.do_act("arm", s[0], deadline_us=100000)
    assert r.WhichOneof("body") == "act" and r.act.flags & harness.ACT_FALLBACK == 0
    samples, _ = scrape(svc.url)
    return value(samples, "veer_acts_total")


def test_bad_requests_get_their_codes_and_service_keeps_serving(continuous_bundle, start):
    svc = start(continuous_bundle)
    s = continuous_bundle.states
    svc.c.put_samples("pick", s[:20], np.arange(20, dtype=np.float32))
    svc.c.switch("arm", "pick")
    port = svc.http_port

    assert status_of(exchange(port, b"\x16\x03\x01\x02\x00garbage that is not HTTP\r\n\r\n")) == 400
    assert status_of(exchange(port, b"GET /metrics HTTP/1.1\r\nHost: x\r\nBad Header Line\r\n\r\n")) == 400
    assert status_of(exchange(port, b"GET /metrics HTTP/9.9\r\n\r\n")) == 505
    assert status_of(exchange(port, b"GET /metrics HTTP/1.1\r\nContent-Length: -5\r\n\r\n")) == 400
    big = b"GET /metrics HTTP/1.1\r\nHost: x\r\nX-Filler: " + b"a" * 20000 + b"\r\n\r\n"
    assert status_of(exchange(port, big)) == 431
    long_url = b"GET /" + b"m" * 20000 + b" HTTP/1.1\r\nHost: x\r\n\r\n"
    assert status_of(exchange(port, long_url)) == 431
    r = exchange(port, b"DELETE /metrics HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
    assert status_of(r) == 405 and headers_of(r)["allow"] == "GET, HEAD"
    r = exchange(port, b"POST /metrics HTTP/1.1\r\nHost: x\r\nContent-Length: 100000\r\n\r\n" + b"x" * 100000)
    assert status_of(r) == 413
    assert status_of(exchange(port, b"GET /nothing-here HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")) == 404
    assert status_of(exchange(port, b"GET /metricsX HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")) == 404
    # HEAD: the GET's headers, no body.
    r = exchange(port, b"HEAD /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n", wait=3)
    assert status_of(r) == 200 and int(headers_of(r)["content-length"]) == len("alive\n")
    assert r.endswith(b"\r\n\r\n")
    # A query string does not change the path.
    assert status_of(exchange(port, b"GET /healthz?verbose=1 HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")) == 200
    # Keep-alive: two requests on one connection, both answered.
    with socket.create_connection(("127.0.0.1", port), timeout=10) as c:
        c.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\nGET /readyz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
        data = b""
        end = time.monotonic() + 10
        while time.monotonic() < end:
            chunk = c.recv(65536)
            if not chunk:
                break
            data += chunk
        assert data.count(b"HTTP/1.1 200 OK") == 2, data
    assert still_serving(svc, s) >= 1


def test_slow_header_is_cut_off_in_bounded_time(continuous_bundle, start):
    svc = start(continuous_bundle)
    s = continuous_bundle.states
    svc.c.put_samples("pick", s[:20], np.arange(20, dtype=np.float32))
    svc.c.switch("arm", "pick")
    with socket.create_connection(("127.0.0.1", svc.http_port), timeout=15) as c:
        t0 = time.monotonic()
        c.sendall(b"GET /metrics HTTP/1.1\r\n")
        # Trickle header bytes every half second: each byte must not extend the deadline.
        answered = b""
        c.settimeout(0.5)
        while time.monotonic() - t0 < REQUEST_TIMEOUT_S + 5:
            try:
                c.sendall(b"X")
            except (BrokenPipeError, ConnectionResetError):
                break
            try:
                chunk = c.recv(4096)
            except socket.timeout:
                continue
            if not chunk:
                break
            answered += chunk
        elapsed = time.monotonic() - t0
    assert status_of(answered) == 408, answered
    assert REQUEST_TIMEOUT_S - 0.5 <= elapsed <= REQUEST_TIMEOUT_S + 5
    # Meanwhile and afterwards, acts and metrics are served.
    assert still_serving(svc, s) >= 1


def test_connection_limit(continuous_bundle, start):
    svc = start(continuous_bundle)
    held = []
    try:
        for _ in range(64):  # src/service/http.c default limit
            held.append(socket.create_connection(("127.0.0.1", svc.http_port), timeout=5))
        time.sleep(0.3)  # let the loop accept them all
        with socket.create_connection(("127.0.0.1", svc.http_port), timeout=5) as extra:
            assert status_of(read_response(extra, 5)) == 503
    finally:
        for h in held:
            h.close()
    # The held connections are gone; a new one is served.
    time.sleep(0.3)
    assert get(svc.url + "/healthz")[0] == 200


def test_bad_http_address_is_a_configuration_error(continuous_bundle, tmp_path):
    eps = harness.endpoints("tcp", tmp_path)
    for bad in ("nonsense", "127.0.0.1:99999", "example.org:80", "127.0.0.1:"):
        p = subprocess.run([harness.VEERD, "--bundle", str(continuous_bundle.path), "--state-dir",
                            str(tmp_path / "st"), "--act", eps["act"], "--admin", eps["admin"], "--events",
                            eps["events"], "--http", bad], capture_output=True, text=True, timeout=30)
        assert p.returncode == 2, (bad, p.stderr)
        assert "--http" in p.stderr
