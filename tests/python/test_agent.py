"""The Python agent package against the real C++ server, end to end."""

from __future__ import annotations

import threading
import time

import pytest

import tickmark


def test_publish_steps_and_read_them_back(server):
    session, admin = server.session()
    token = server.token(session, admin, "agent", "rover-1")
    with tickmark.Agent(server.address, token=token, client_id="rover-py") as agent:
        assert agent.session_id == session
        assert agent.name == "rover-1"
        for i in range(20):
            agent.step(["north", "east"][i % 2], state=f"{i},0", features=[i, 0.5], episode=1)
        assert agent.flush(10)
        steps = [r.step for r in agent.records(("step",), follow=False)]
    assert [s.step_id for s in steps] == list(range(1, 21))
    assert [s.action for s in steps[:2]] == ["north", "east"]
    assert steps[3].state == b"3,0"
    assert list(steps[3].features) == [3.0, 0.5]
    assert all(s.agent == "rover-1" for s in steps)
    # Mapped onto session time in order, with a stated uncertainty.
    starts = [s.start_session_ns for s in steps]
    assert starts == sorted(starts)
    assert all(s.uncertainty_ns > 0 for s in steps)


def test_bad_token_is_refused_with_the_servers_reason(server):
    with pytest.raises(tickmark.StreamError) as e:
        tickmark.Agent(server.address, token="tmk_not-a-token", connect_timeout=5)
    assert e.value.code.name == "UNAUTHENTICATED"


def test_settled_labels_reach_the_agent(server):
    session, admin = server.session(kernel="uniform:0.2,4.0")
    agent_token = server.token(session, admin, "agent", "rover-1")
    trainer_token = server.token(session, admin, "trainer", "trainer-a")
    from tickmark._connect import open_channel
    from tickmark._stream import ReconnectingStream
    from tickmark.v1 import records_pb2, stream_pb2
    with tickmark.Agent(server.address, token=agent_token) as agent:
        for i in range(6):
            agent.step("east", state=f"{i},0")
            time.sleep(0.1)  # steps 100 ms apart on the agent's clock
        agent.flush(10)
        trainer = ReconnectingStream(open_channel(server.address), "train", trainer_token, "t1",
                                     records_pb2.SOURCE_KIND_SCRIPT, "test", "pytest")
        assert trainer.wait_connected(10)
        trainer.send(stream_pb2.FeedbackMessage(value=1.0, event_source_ns=time.monotonic_ns()))
        assert trainer.flush(10)
        trainer.close()
        server.close_session(session, admin)
        labels = list(agent.labels())
    assert len(labels) == 6
    # Uniform 0.2–4 s: the feedback came ~0.1 s after the last step started,
    # so only steps that started at least 0.2 s before it got credit.
    assert sum(l.weight for l in labels) > 0
    assert labels[-1].weight == 0
    assert all(l.value >= 0 for l in labels)
    assert all(p.trainer == "trainer-a" for l in labels for p in l.parts)


def test_resume_after_a_killed_connection_no_gap_no_duplicate(server, links):
    session, admin = server.session()
    token = server.token(session, admin, "agent", "rover-1")
    link = links(server.address)
    agent = tickmark.Agent(link.address, token=token, client_id="rover-resume")
    for i in range(30):
        agent.step("east", state=f"{i},0")
    assert agent.flush(10)
    link.kill()  # the connection dies mid-session
    for i in range(30, 60):
        agent.step("west", state=f"{i},0")  # queued while the link is down
    link.start(port=link.port)
    assert agent.flush(30)
    assert agent._stream.reconnects >= 1

    # A subscriber reading through a link that dies halfway resumes after its
    # last record: every sequence once, in order.
    seen = []
    sub = agent.records(("step",))
    killer_done = threading.Event()

    def read():
        for r in sub:
            seen.append(r.sequence)
            if len(seen) == 25 and not killer_done.is_set():
                link.kill()
                link.start(port=link.port)
                killer_done.set()
            if len(seen) == 60:
                sub.close()

    t = threading.Thread(target=read)
    t.start()
    t.join(60)
    agent.close()
    assert killer_done.is_set()
    assert len(seen) == 60
    assert seen == sorted(seen) and len(set(seen)) == 60
    # And the ledger holds each step exactly once.
    with tickmark.Agent(server.address, token=token, client_id="rover-check") as check:
        ids = [r.step.state for r in check.records(("step",), follow=False)]
    assert len(ids) == 60 and len(set(ids)) == 60


def test_run_episode_with_any_env(server):
    session, admin = server.session()
    token = server.token(session, admin, "agent", "rover-1")

    class Corridor:
        def reset(self):
            self.x = 0
            return self.x

        def step(self, action):
            self.x += 1 if action == "right" else 0
            return self.x, 0.0, self.x >= 5, {}

    with tickmark.Agent(server.address, token=token) as agent:
        n = tickmark.run_episode(Corridor(), agent, lambda obs: "right", episode=3)
        agent.flush(10)
        steps = [r.step for r in agent.records(("step",), follow=False)]
    assert n == 5
    assert [s.episode for s in steps] == [3] * 5
    assert [s.state for s in steps] == [b"0", b"1", b"2", b"3", b"4"]
