"""The agent side of tickmark: publish steps, read credit and labels."""

from __future__ import annotations

import socket
import time
from typing import Callable, Iterable, Iterator, Optional, Sequence

from tickmark._connect import open_channel, read_token
from tickmark._stream import ReconnectingStream, StreamError
from tickmark.subscription import Subscription
from tickmark.v1 import records_pb2, stream_pb2


class Agent:
    """A learner connected to one tickmark session.

    >>> with Agent("127.0.0.1:7461", token_file="agent.token") as agent:
    ...     agent.step("north", state=b"3,4", features=[3, 4])
    ...     for label in agent.labels():          # settled labels, in order
    ...         print(label.step_id, label.value)

    Steps are timed on `clock` (default: CLOCK_MONOTONIC via
    time.monotonic_ns); the server probes that clock on the stream and maps
    every step onto the session timeline. While this host's clock is
    disciplined (NTP/PTP; the kernel says synchronised), each step also
    carries its CLOCK_REALTIME reading and the kernel's bound, so the server
    may map it through real time (send_realtime=False: never). Steps are
    kept until the server acknowledges them and resent after a reconnect;
    the server stores each once. Thread-safe: step() may be called from any
    thread.
    """

    def __init__(self, server: str = "127.0.0.1:7461", *, token: Optional[str] = None,
                 token_file: Optional[str] = None, client_id: Optional[str] = None,
                 clock: Callable[[], int] = time.monotonic_ns, ca_file: Optional[str] = None,
                 insecure: bool = False, description: str = "python agent",
                 connect_timeout: float = 10.0, send_realtime: bool = True):
        self._token = read_token(token, token_file)
        self._channel = open_channel(server, ca_file=ca_file, insecure=insecure)
        # Another instance owning the session is reached the same way.
        self._channel_for = lambda target: open_channel(target, ca_file=ca_file, insecure=insecure)
        self._clock = clock
        self._client_id = client_id or f"{socket.gethostname()[:40]}:agent-py"
        self._stream = ReconnectingStream(
            self._channel, "act", self._token, self._client_id,
            records_pb2.SOURCE_KIND_SCRIPT, description, "tickmark-python 0.1", clock,
            send_realtime=send_realtime, channel_for=self._channel_for)
        if not self._stream.wait_connected(connect_timeout):
            error = self._stream._error  # a refused hello says why
            self._stream.close(0)
            if error:
                raise error
            raise TimeoutError(f"no answer from tickmarkd at {server} within {connect_timeout} s")
        self._step_id = 0
        self._subscriptions: list = []

    # -- publishing --------------------------------------------------------
    @property
    def session_id(self) -> str:
        return self._stream.session_id

    @property
    def name(self) -> str:
        """The agent name the token gives."""
        return self._stream.subject

    @property
    def server_version(self) -> str:
        """The server's release, from its Welcome (e.g. "0.1.0")."""
        return self._stream.server_version

    @property
    def contract_version(self) -> str:
        """The wire-contract revision the server speaks (docs/compatibility.md)."""
        return self._stream.contract_version

    def now(self) -> int:
        """This agent's clock, in nanoseconds."""
        return self._clock()

    def step(self, action: str, state: bytes = b"", features: Optional[Sequence[float]] = None, *,
             episode: int = 0, step_id: Optional[int] = None, start_ns: Optional[int] = None,
             end_ns: int = 0) -> int:
        """Publishes one step starting now (or at start_ns on this agent's clock).

        The step ends when the next one starts unless end_ns is given. Returns
        the step id (consecutive from 1 unless given).
        """
        if step_id is None:
            self._step_id += 1
            step_id = self._step_id
        else:
            self._step_id = max(self._step_id, step_id)
        if isinstance(state, str):
            state = state.encode()
        message = stream_pb2.StepMessage(
            step_id=step_id, episode=episode,
            start_agent_ns=self._clock() if start_ns is None else start_ns,
            end_agent_ns=end_ns, action=str(action), state=state,
            features=[float(x) for x in (features or ())])
        self._stream.send(message)
        return step_id

    def flush(self, timeout: Optional[float] = 10.0) -> bool:
        """Waits until every step is stored; False at the timeout."""
        return self._stream.flush(timeout)

    # -- reading -----------------------------------------------------------
    def records(self, kinds: Iterable[str] = (), from_sequence: int = 1,
                follow: bool = True) -> Subscription:
        """The session's records (of the given kinds) as an iterable Subscription."""
        sub = Subscription(self._channel, self._token, self.session_id, from_sequence,
                           kinds, follow, channel_for=self._channel_for)
        self._subscriptions.append(sub)
        return sub

    def labels(self, from_sequence: int = 1, follow: bool = True) -> Iterator[records_pb2.Label]:
        """Settled labels of this session, in order (each once)."""
        for record in self.records(("label",), from_sequence, follow):
            yield record.label

    def credits(self, from_sequence: int = 1,
                follow: bool = True) -> Iterator[records_pb2.CreditUpdate]:
        """Credit updates as feedback arrives (before labels settle)."""
        for record in self.records(("credit",), from_sequence, follow):
            yield record.credit

    # -- lifetime ----------------------------------------------------------
    def close(self, timeout: float = 10.0) -> None:
        for sub in self._subscriptions:
            sub.close()
        try:
            self._stream.close(timeout)
        finally:
            self._channel.close()

    def __enter__(self) -> "Agent":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def run_episode(env, agent: Agent, policy: Callable, *, episode: int = 0,
                max_steps: int = 1000, state_of: Callable = None, features_of: Callable = None,
                pace: float = 0.0):
    """Runs one episode of any environment with reset() and step(action).

    Each action the policy picks is published as a step before it is applied.
    step() may return (obs, reward, done, info) or (obs, reward, terminated,
    truncated, info). `pace` sleeps between steps (seconds) so a human can
    follow. Returns the number of steps taken.
    """
    observation = env.reset()
    if isinstance(observation, tuple) and len(observation) == 2:
        observation = observation[0]
    for n in range(1, max_steps + 1):
        action = policy(observation)
        state = state_of(observation) if state_of else repr(observation).encode()
        features = features_of(observation) if features_of else None
        agent.step(str(action), state=state, features=features, episode=episode)
        result = env.step(action)
        observation, done = result[0], bool(result[2]) or (len(result) == 5 and bool(result[3]))
        if done:
            return n
        if pace:
            time.sleep(pace)  # paced for a human trainer
    return max_steps
