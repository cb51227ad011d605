"""Python client for veerd: the controller's act call and the supervisor's task and channel calls.

The messages are proto/veer_wire.proto, generated at build time into ``veer_wire_pb2`` (the build
puts it on PYTHONPATH). Sockets are pyzmq DEALERs: veerd's act and admin sockets are ROUTERs, and
a DEALER, unlike a REQ, lets a caller give up on a reply and send the next request; a reply that
comes later is recognised by its id and dropped. The admin socket sends the empty delimiter frame
a REQ would, the act socket the bare message, as the C client does.

Acting keeps a hard local deadline like the C client (include/veer/client.h): :meth:`Client.act`
waits on the socket only until the deadline and otherwise returns the model's fallback action,
learnt from a describe request when the client opened, with ``FALLBACK | DEADLINE`` in its flags.
Python adds tens of microseconds per call, so for kHz loops use the C client; this one is for
scripts, notebooks and tests.

A Client belongs to one thread at a time (ZeroMQ sockets are not thread-safe): open one per
thread.

Example::

    from veer.client import Client
    with Client(act="tcp://127.0.0.1:7710", admin="tcp://127.0.0.1:7711") as c:
        c.put_goals("to_bin_3", [[0.4, 0.1, 0.0, 0.0]])
        c.switch("arm", "to_bin_3")
        r = c.act("arm", [0.0, 0.2, 0.0, 0.0])
        print(r.action, r.fallback)
"""
from __future__ import annotations

import dataclasses
import itertools
import math
import select
import time
from typing import List, Optional, Sequence

import numpy as np
import zmq

import veer_wire_pb2 as wire

PROTOCOL = 1
DEFAULT_ACT = "tcp://127.0.0.1:7710"
DEFAULT_ADMIN = "tcp://127.0.0.1:7711"

# VEER_ACT_* flag bits (include/veer/runtime.h).
CLIPPED = 1 << 0
FALLBACK = 1 << 1
NONFINITE = 1 << 2
DEADLINE = 1 << 3
NO_TASK = 1 << 4
OUT_OF_COVERAGE = 1 << 5
FLAG_NAMES = {CLIPPED: "clipped", FALLBACK: "fallback", NONFINITE: "nonfinite",
              DEADLINE: "deadline", NO_TASK: "no_task", OUT_OF_COVERAGE: "out_of_coverage"}

# VEER_E* numbers used on this side (include/veer/error.h).
EINVAL = -1
ENONFINITE = -16
EBADMSG = -40
ETIMEDOUT = -49

_SOURCES = {1: "samples", 2: "goals", 3: "reference"}


class VeerError(Exception):
    """veerd refused a request, or the client could not complete it.

    ``code`` is the negative VEER_E* number, ``name`` its symbol (e.g. ``"VEER_EDIM"``),
    ``field`` the offending field as veerd names it, ``message`` veerd's sentence.
    """

    def __init__(self, code: int, name: str, message: str, field: str = ""):
        self.code, self.name, self.message, self.field = code, name, message, field
        where = f" in {field}" if field else ""
        super().__init__(f"{name}{where}: {message}")


class VeerTimeout(VeerError):
    """veerd did not answer a supervisor call (or the describe at open) in time."""

    def __init__(self, message: str):
        super().__init__(ETIMEDOUT, "VEER_ETIMEDOUT", message)


@dataclasses.dataclass
class Model:
    """What veerd serves, from its describe reply."""
    model_version: str
    digest: bytes
    state_dim: int
    z_dim: int
    feature_names: List[str]
    action_kind: int          # 1 continuous, 2 discrete
    action_dim: int
    action_count: int
    action_low: np.ndarray
    action_high: np.ndarray
    fallback_action: np.ndarray
    decision_step_s: float
    discount: float
    default_deadline_us: int


@dataclasses.dataclass
class ActResult:
    """One act call's answer. ``action`` is float32 (action_dim,); ``flags`` VEER_ACT_* bits."""
    action: np.ndarray
    value: float
    flags: int
    epoch: int
    task: str
    seq: int
    server_us: int
    round_trip_s: float

    @property
    def fallback(self) -> bool:
        """True when the action is the model's fallback action (for any reason)."""
        return bool(self.flags & FALLBACK)

    @property
    def flag_names(self) -> List[str]:
        return [n for b, n in FLAG_NAMES.items() if self.flags & b]


@dataclasses.dataclass
class Task:
    """veerd's record of a stored task."""
    name: str
    digest: bytes
    source: str               # "samples", "goals" or "reference"
    count: int
    r2: float                 # expressiveness; NaN when it does not apply
    norm_raw: float
    z: np.ndarray             # float32 (z_dim,)
    active_on: List[str]
    encoded: bool


@dataclasses.dataclass
class Channel:
    name: str
    task: str
    epoch: int
    acts: int


@dataclasses.dataclass
class Status:
    version: str
    model_version: str
    ready: bool
    uptime_s: float
    tasks: int
    channels: int
    acts: int
    fallbacks: int
    deadline_misses: int


def _task(t) -> Task:
    return Task(name=t.name, digest=bytes(t.digest), source=_SOURCES.get(t.source, "unknown"),
                count=t.count, r2=t.r2, norm_raw=t.norm_raw, z=np.array(t.z, dtype=np.float32),
                active_on=list(t.active_on), encoded=t.encoded)


def _channel(c) -> Channel:
    return Channel(name=c.name, task=c.task, epoch=c.epoch, acts=c.acts)


def _choice(v: Optional[bool]) -> int:
    if v is None:
        return wire.CHOICE_DEFAULT
    return wire.CHOICE_ON if v else wire.CHOICE_OFF


def _matrix(x, what: str) -> np.ndarray:
    a = np.asarray(x, dtype=np.float32)
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2:
        raise ValueError(f"{what} must be a 2-D array (rows x state_dim), got shape {a.shape}")
    return np.ascontiguousarray(a)


def _vector(x, what: str) -> np.ndarray:
    a = np.asarray(x, dtype=np.float32)
    if a.ndim == 2 and 1 in a.shape:
        a = a.ravel()
    if a.ndim != 1:
        raise ValueError(f"{what} must be a 1-D array, got shape {a.shape}")
    return a


class Client:
    """A connection to veerd: ``act`` for controllers, the rest for supervisors.

    act, admin: endpoints of veerd's act and admin sockets (None: not opened). With ``act``,
    the constructor asks veerd to describe its model and raises VeerTimeout when it does not
    answer within ``timeout_s``.
    server_key, public_key, secret_key: Z85 CURVE keys (str, 40 characters) to authenticate
    to veerd; the admin socket uses them, the act socket too when ``act_curve``.
    """

    def __init__(self, act: Optional[str] = None, admin: Optional[str] = None, *,
                 timeout_s: float = 5.0, server_key: Optional[str] = None,
                 public_key: Optional[str] = None, secret_key: Optional[str] = None,
                 act_curve: bool = False, context: Optional[zmq.Context] = None):
        if act is None and admin is None:
            raise ValueError("give veerd's act endpoint, its admin endpoint, or both")
        if server_key is not None and (public_key is None or secret_key is None):
            raise ValueError("server_key needs this client's public_key and secret_key too")
        self.timeout_s = float(timeout_s)
        self._ctx = context or zmq.Context.instance()
        self._ids = itertools.count(1)
        self.model: Optional[Model] = None
        self.late_discarded = 0
        #: act replies from a model other than the one described (veerd now serves another
        #: bundle; the stored fallback may be stale: call describe()).
        self.model_changes = 0
        self._act = self._admin = None
        try:
            if admin is not None:
                self._admin = self._socket(admin, server_key, public_key, secret_key)
            if act is not None:
                self._act = self._socket(act, server_key if act_curve else None, public_key,
                                         secret_key)
                self._act_poll = select.poll()
                self._act_poll.register(self._act.getsockopt(zmq.FD), select.POLLIN)
                self.describe()
        except BaseException:
            self.close()
            raise

    def _socket(self, endpoint, server_key, public_key, secret_key):
        s = self._ctx.socket(zmq.DEALER)
        s.setsockopt(zmq.LINGER, 0)
        s.setsockopt(zmq.IMMEDIATE, 1)
        if server_key is not None:
            s.curve_serverkey = server_key.encode() if isinstance(server_key, str) else server_key
            s.curve_publickey = public_key.encode() if isinstance(public_key, str) else public_key
            s.curve_secretkey = secret_key.encode() if isinstance(secret_key, str) else secret_key
        s.connect(endpoint)
        return s

    def close(self) -> None:
        """Closes the sockets without waiting for unsent messages."""
        for s in (self._act, self._admin):
            if s is not None:
                s.close(linger=0)
        self._act = self._admin = None

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ---- the exchange every supervisor call shares ----

    def _call(self, sock, req: "wire.Request") -> "wire.Reply":
        if sock is None:
            raise VeerError(EINVAL, "VEER_EINVAL", "this client was opened without that "
                            "endpoint", "admin" if sock is self._admin else "act")
        req.protocol = PROTOCOL
        req.id = next(self._ids)
        body = req.SerializeToString()
        frames = [b"", body] if sock is self._admin else [body]
        deadline = time.monotonic() + self.timeout_s
        while True:  # an unconnected DEALER with IMMEDIATE refuses to queue: retry until timeout
            try:
                sock.send_multipart(frames, flags=zmq.NOBLOCK)
                break
            except zmq.Again:
                if time.monotonic() >= deadline:
                    raise VeerTimeout(f"veerd is not connected after {self.timeout_s} s")
                time.sleep(0.002)
        while True:
            left = deadline - time.monotonic()
            if left <= 0 or not sock.poll(max(1, int(math.ceil(left * 1000)))):
                raise VeerTimeout(f"veerd did not answer within {self.timeout_s} s: is it "
                                  "running, is the endpoint right, and (with CURVE) are the "
                                  "keys right?")
            reply = wire.Reply()
            try:
                reply.ParseFromString(sock.recv_multipart()[-1])
            except Exception:
                continue  # not a reply we can read: keep waiting for ours
            if reply.id != req.id:
                continue  # a stale reply to an earlier call that timed out
            if reply.WhichOneof("body") == "error":
                e = reply.error
                raise VeerError(e.code, e.name, e.message, e.field)
            return reply

    def _admin_call(self, **body) -> "wire.Reply":
        req = wire.Request()
        for k, v in body.items():
            getattr(req, k).CopyFrom(v)
        return self._call(self._admin, req)

    # ---- model ----

    def describe(self) -> Model:
        """Asks veerd for its model (on the act socket when open, else admin) and keeps it."""
        req = wire.Request()
        req.describe.SetInParent()
        d = self._call(self._act if self._act is not None else self._admin, req).describe
        self.model = Model(
            model_version=d.model_version, digest=bytes(d.model_digest), state_dim=d.state_dim,
            z_dim=d.z_dim, feature_names=list(d.feature_names), action_kind=d.action_kind,
            action_dim=d.action_dim, action_count=d.action_count,
            action_low=np.array(d.action_low, dtype=np.float32),
            action_high=np.array(d.action_high, dtype=np.float32),
            fallback_action=np.array(d.fallback_action, dtype=np.float32),
            decision_step_s=d.decision_step_s, discount=d.discount,
            default_deadline_us=d.default_deadline_us)
        if len(self.model.fallback_action) != d.action_dim:
            raise VeerError(EBADMSG, "VEER_EBADMSG", "veerd's fallback action does not have "
                            "action_dim values", "describe")
        return self.model

    # ---- acting ----

    def act(self, channel: str, state, deadline_us: Optional[int] = None) -> ActResult:
        """The action for ``state`` on ``channel``, or the fallback action once the deadline
        (microseconds from the call; default: the model's) passes, flagged FALLBACK|DEADLINE.

        Raises VeerError for a state of the wrong length or with NaN/infinity (nothing is sent)
        and when veerd refuses the request.
        """
        t0 = time.monotonic()
        if self._act is None or self.model is None:
            raise VeerError(EINVAL, "VEER_EINVAL", "this client was opened without an act "
                            "endpoint", "act")
        m = self.model
        s = np.asarray(state, dtype=np.float32).ravel()
        if s.shape[0] != m.state_dim:
            raise VeerError(-31, "VEER_EDIM", f"the state has {s.shape[0]} values; the model "
                            f"reads {m.state_dim}", "state")
        if not np.all(np.isfinite(s)):
            i = int(np.flatnonzero(~np.isfinite(s))[0])
            raise VeerError(ENONFINITE, "VEER_ENONFINITE", f"state[{i}] is {s[i]}", "state")
        deadline_us = int(deadline_us or m.default_deadline_us or 1000)
        deadline = t0 + deadline_us * 1e-6
        seq = next(self._ids)
        req = wire.Request(protocol=PROTOCOL, id=seq)
        req.act.channel = channel
        req.act.state.extend(s.tolist())
        req.act.deadline_us = deadline_us
        req.act.seq = seq

        def fallback() -> ActResult:
            return ActResult(action=m.fallback_action.copy(), value=0.0,
                             flags=FALLBACK | DEADLINE, epoch=0, task="", seq=seq, server_us=0,
                             round_trip_s=time.monotonic() - t0)

        try:
            self._act.send(req.SerializeToString(), flags=zmq.NOBLOCK)
        except zmq.Again:
            return fallback()  # not connected: no answer can come in time
        while True:
            try:
                body = self._act.recv_multipart(flags=zmq.NOBLOCK)[-1]
            except zmq.Again:
                left = deadline - time.monotonic()
                if left <= 0:
                    return fallback()
                # ZeroMQ's descriptor is edge-triggered: sleep on it only after a receive found
                # nothing, then try again whatever woke us. poll() rounds its timeout up to whole
                # milliseconds, so the last millisecond is spent polling without sleeping rather
                # than overshooting the deadline.
                self._act_poll.poll(int(left * 1000.0) if left >= 1e-3 else 0)
                continue
            reply = wire.Reply()
            try:
                reply.ParseFromString(body)
            except Exception:
                continue
            kind = reply.WhichOneof("body")
            if kind == "act" and reply.act.seq == seq:
                a = reply.act
                action = np.array(a.action, dtype=np.float32)
                if action.shape[0] != m.action_dim or not np.all(np.isfinite(action)):
                    continue  # garbled: never hand it to an actuator
                if a.model_version and a.model_version != m.model_version:
                    self.model_changes += 1
                return ActResult(action=action, value=a.value, flags=a.flags, epoch=a.epoch,
                                 task=a.task, seq=seq, server_us=a.server_us,
                                 round_trip_s=time.monotonic() - t0)
            if kind == "error" and reply.id == seq:
                e = reply.error
                raise VeerError(e.code, e.name, e.message, e.field)
            self.late_discarded += 1

    # ---- tasks ----

    @staticmethod
    def _options(spec, center, rescale, cov_correction, ridge):
        spec.options.center = _choice(center)
        spec.options.rescale = _choice(rescale)
        spec.options.cov_correction = bool(cov_correction)
        spec.options.ridge = 0.0 if ridge is None else float(ridge)

    def _put(self, name: str, spec) -> Task:
        put = wire.PutTask(name=name)
        put.spec.CopyFrom(spec)
        r = self._admin_call(put_task=put)
        return _task(r.task) if r.WhichOneof("body") == "task" else None

    def put_samples(self, name: str, states, rewards, *, center: Optional[bool] = None,
                    rescale: Optional[bool] = None, cov_correction: bool = False,
                    ridge: Optional[float] = None) -> Task:
        """Registers a task from reward samples: ``states`` (n, state_dim), ``rewards`` (n,).
        None options take the model's defaults. Returns veerd's record of the task."""
        s, r = _matrix(states, "states"), _vector(rewards, "rewards")
        if s.shape[0] != r.shape[0]:
            raise ValueError(f"{s.shape[0]} states but {r.shape[0]} rewards")
        spec = wire.TaskSpec()
        spec.samples.states.extend(s.ravel().tolist())
        spec.samples.rewards.extend(r.tolist())
        self._options(spec, center, rescale, cov_correction, ridge)
        return self._put(name, spec)

    def put_goals(self, name: str, goals, weights=None, *, rescale: Optional[bool] = None) -> Task:
        """Registers a task from goal states ``goals`` (k, state_dim) with optional weights (k,)."""
        g = _matrix(goals, "goals")
        spec = wire.TaskSpec()
        spec.goals.states.extend(g.ravel().tolist())
        if weights is not None:
            w = _vector(weights, "weights")
            if w.shape[0] != g.shape[0]:
                raise ValueError(f"{g.shape[0]} goals but {w.shape[0]} weights")
            spec.goals.weights.extend(w.tolist())
        self._options(spec, None, rescale, False, None)
        return self._put(name, spec)

    def put_reference(self, name: str, rewards, *, center: Optional[bool] = None,
                      rescale: Optional[bool] = None) -> Task:
        """Registers a task from one reward per reference state of the model's bundle."""
        spec = wire.TaskSpec()
        spec.reference.rewards.extend(_vector(rewards, "rewards").tolist())
        self._options(spec, center, rescale, False, None)
        return self._put(name, spec)

    def get_task(self, name: str) -> Task:
        return _task(self._admin_call(get_task=wire.GetTask(name=name)).task)

    def list_tasks(self) -> List[Task]:
        return [_task(t) for t in self._admin_call(list_tasks=wire.ListTasks()).tasks.tasks]

    def drop_task(self, name: str) -> None:
        """Drops a task; VeerError VEER_ETASKACTIVE while a channel runs it."""
        self._admin_call(drop_task=wire.DropTask(name=name))

    # ---- channels and status ----

    def switch(self, channel: str, task: str) -> Optional[Channel]:
        """Makes ``task`` the active task of ``channel`` (created on its first switch)."""
        r = self._admin_call(switch_channel=wire.SwitchChannel(channel=channel, task=task))
        return _channel(r.channel) if r.WhichOneof("body") == "channel" else None

    def channels(self) -> List[Channel]:
        return [_channel(c) for c in
                self._admin_call(list_channels=wire.ListChannels()).channels.channels]

    def status(self) -> Status:
        s = self._admin_call(status=wire.StatusRequest()).status
        return Status(version=s.version, model_version=s.model_version, ready=s.ready,
                      uptime_s=s.uptime_s, tasks=s.tasks, channels=s.channels, acts=s.acts,
                      fallbacks=s.fallbacks, deadline_misses=s.deadline_misses)


class Events:
    """A subscriber on veerd's events socket (PUB): channel switches, stored and dropped tasks,
    drift alarms, deadline bursts and model loads, each as a topic and a ``wire.Event``.

    ``topics`` are prefixes ("veer.switch", "veer.task", ...); the default takes everything.
    Like any ZeroMQ subscriber it only sees events published after its subscription reached
    veerd (a few milliseconds after connecting); a gap in ``Event.seq`` means events were lost
    because this subscriber fell behind.
    """

    def __init__(self, endpoint: str, topics: Sequence[str] = ("",), *,
                 context: Optional[zmq.Context] = None):
        self._sock = (context or zmq.Context.instance()).socket(zmq.SUB)
        self._sock.setsockopt(zmq.LINGER, 0)
        for t in topics:
            self._sock.setsockopt(zmq.SUBSCRIBE, t.encode())
        self._sock.connect(endpoint)

    def recv(self, timeout_s: Optional[float] = None):
        """The next (topic, Event), or None when ``timeout_s`` passes first (None: wait)."""
        if timeout_s is not None and not self._sock.poll(max(0, int(timeout_s * 1000))):
            return None
        frames = self._sock.recv_multipart()
        ev = wire.Event()
        ev.ParseFromString(frames[-1])
        return frames[0].decode(errors="replace"), ev

    def close(self) -> None:
        self._sock.close(linger=0)

    def __enter__(self) -> "Events":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def flag_names(flags: int) -> List[str]:
    """The names of the VEER_ACT_* bits set in ``flags``."""
    return [n for b, n in FLAG_NAMES.items() if flags & b]


__all__ = ["Client", "Events", "VeerError", "VeerTimeout", "Model", "ActResult", "Task", "Channel",
           "Status", "flag_names", "CLIPPED", "FALLBACK", "NONFINITE", "DEADLINE", "NO_TASK",
           "OUT_OF_COVERAGE", "DEFAULT_ACT", "DEFAULT_ADMIN"]
