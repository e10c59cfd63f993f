"""A Flower Grid that delivers messages to ClientApps in this process, without Ray or a SuperLink.

Used by the demo's ``inprocess`` engine and by tests that exercise the ServerApp and ClientApp
adapters end to end. Messages go through Flower's own Message/RecordDict types and the ClientApp's own
routing (``query.validate``); only the transport is replaced.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterable, Sequence
from contextlib import contextmanager
from pathlib import Path

from flwr.app import Context, Message, RecordDict
from flwr.clientapp import ClientApp
from flwr.serverapp import Grid, ServerApp
from flwr.supercore.task_identity import TaskIdentity

SERVER_NODE_ID = 0


@contextmanager
def _identity(run_id: int, node_id: int, task_id: int):  # noqa: ANN202
    saved = (TaskIdentity._run_id, TaskIdentity._node_id, TaskIdentity._task_id)
    TaskIdentity.run_id, TaskIdentity.node_id, TaskIdentity.task_id = run_id, node_id, task_id
    try:
        yield
    finally:
        TaskIdentity._run_id, TaskIdentity._node_id, TaskIdentity._task_id = saved


class LoopbackGrid(Grid):
    """Nodes ``1..N``, each running ``client_app`` with its own Context; ``silent`` nodes never answer."""

    def __init__(
        self, client_app: ClientApp, node_configs: Sequence[dict], run_id: int = 1, silent: Iterable[int] = ()
    ) -> None:
        self._client_app = client_app
        self._run_id = run_id
        self._contexts = {
            i + 1: Context(run_id=run_id, node_id=i + 1, node_config=dict(cfg), state=RecordDict(), run_config={})
            for i, cfg in enumerate(node_configs)
        }
        self._silent = set(silent)
        self._replies: dict[str, Message] = {}

    # The run is not modelled: the adapters under test never read it.
    def set_run(self, run):  # noqa: ANN001, ANN201
        return None

    @property
    def run(self):  # noqa: ANN201
        raise NotImplementedError

    def create_message(self, content, message_type, dst_node_id, group_id, ttl=None):  # noqa: ANN001, ANN201
        return Message(content, dst_node_id, message_type, ttl=ttl, group_id=group_id)

    def get_node_ids(self) -> Iterable[int]:
        return list(self._contexts)

    def push_messages(self, messages: Iterable[Message]) -> Iterable[str]:
        ids = []
        for message in messages:
            message_id = uuid.uuid4().hex
            message.metadata.__dict__["_message_id"] = message_id
            node = message.metadata.dst_node_id
            ids.append(message_id)
            if node in self._silent or node not in self._contexts:
                continue
            with _identity(self._run_id, node, 2):
                reply = self._client_app(message, self._contexts[node])
            reply.metadata.__dict__["_message_id"] = uuid.uuid4().hex
            self._replies[message_id] = reply
        return ids

    def pull_messages(self, message_ids: Iterable[str]) -> Iterable[Message]:
        return [self._replies.pop(mid) for mid in list(message_ids) if mid in self._replies]

    def send_and_receive(self, messages, *, timeout=None):  # noqa: ANN001, ANN201
        return self.pull_messages(self.push_messages(messages))


def run_inprocess(
    server_app: ServerApp, client_app: ClientApp, site_dirs: Sequence[Path], silent: Iterable[int] = ()
) -> None:
    """Run ``server_app`` against one in-process node per site folder."""
    grid = LoopbackGrid(client_app, [{"site-dir": str(d)} for d in site_dirs], silent=silent)
    context = Context(run_id=1, node_id=SERVER_NODE_ID, node_config={}, state=RecordDict(), run_config={})
    with _identity(1, SERVER_NODE_ID, 1):
        server_app(grid, context)
