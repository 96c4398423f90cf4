"""tickmark for Python agents: publish steps, receive credit and labels.

    import tickmark
    with tickmark.Agent("127.0.0.1:7461", token_file="agent.token") as agent:
        agent.step("north", state=b"3,4")
        for label in agent.labels():
            print(label.step_id, label.value, label.weight)

A trainer's delay calibration from a program: tickmark.CalibrationRun
(tickmark/calibration.py, docs/calibration.md).

Needs Debian's python3-grpcio and python3-protobuf; numpy is optional.
"""

from tickmark._stream import Rejected, StreamError
from tickmark.agent import Agent, run_episode
from tickmark.calibration import CalibrationFailed, CalibrationRun
from tickmark.subscription import KINDS, Subscription
from tickmark.version import CONTRACT_VERSION, __version__

__all__ = ["Agent", "CONTRACT_VERSION", "CalibrationFailed", "CalibrationRun", "KINDS", "Rejected",
           "StreamError", "Subscription", "__version__", "run_episode"]
