"""The coordinator's SuperLink: starting it (``federation serve``) and talking to its Control API.

One port serves three APIs (Flower 1.42): ``/v1/fleet/`` for sites' SuperNodes, ``/v1/control/`` for run
submission and node registration (no login in the open-source SuperLink), and ``/v1/runtime/`` for the
ServerApp process. Only ``/v1/fleet/`` should be reachable by sites (docs/deployment.md).

``federation serve`` writes ``STUDY/superlink/superlink.toml`` (address and CA certificate) for the other
commands, then replaces itself with the SuperLink (:mod:`federation.deploy.link_process`: Flower's
``flower-superlink`` in the same process, which also registers the study's enrolled node keys once it
listens and names node keys by fingerprint in its log), so the process a service manager (or a test)
starts and stops is the SuperLink itself.
"""

from __future__ import annotations

import os
import sys
import tomllib
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import httpx

from federation.protocol import ValidationToolError

from .certs import CertificatePaths
from .fab import AppBundle
from .nodes import fingerprint_of_reported, parse_node_key

LINK_DIR = "superlink"
LINK_FILE = "superlink.toml"
QUIET_FLOWER = {"FLWR_TELEMETRY_ENABLED": "0", "FLWR_DISABLE_UPDATE_CHECK": "1"}


class SuperLinkError(ValidationToolError):
    """The SuperLink cannot be reached or refused a call."""

    exit_code = 4


@dataclass(frozen=True)
class LinkSettings:
    """How the coordinator's own commands reach its SuperLink."""

    address: str
    root_certificates: Path

    @classmethod
    def for_study(cls, study: Path) -> LinkSettings:
        path = Path(study) / LINK_DIR / LINK_FILE
        try:
            doc = tomllib.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise SuperLinkError(
                f"{path}: not found (start the SuperLink with `federation serve --study {study}`)"
            ) from None
        except tomllib.TOMLDecodeError as exc:
            raise SuperLinkError(f"{path}: not valid TOML ({exc})") from None
        address, root = doc.get("address"), doc.get("root_certificates")
        if not isinstance(address, str) or not isinstance(root, str):
            raise SuperLinkError(f"{path}: needs address and root_certificates (strings)")
        return cls(address, Path(root))

    def write(self, study: Path) -> Path:
        path = Path(study) / LINK_DIR / LINK_FILE
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(
            "# Written by `federation serve`: how the coordinator's commands reach this study's SuperLink.\n"
            f'address = "{self.address}"\nroot_certificates = "{self.root_certificates}"\n'
        )
        return path


def flower_environment(flwr_home: Path, task_poll_s: float | None = None) -> dict[str, str]:
    """Environment for Flower processes: no telemetry or update checks, a private FLWR_HOME, our venv first."""
    env = dict(os.environ)
    env.update(QUIET_FLOWER)
    env["FLWR_HOME"] = str(flwr_home)
    env["PATH"] = os.pathsep.join([str(Path(sys.executable).parent), env.get("PATH", "")])
    if task_poll_s is not None:
        env["FLWR_SUPEREXEC_TASK_POLL_INTERVAL"] = str(task_poll_s)
    return env


def serve_command(study: Path, certs: CertificatePaths, host: str, port: int) -> list[str]:
    """The SuperLink command for a study (state database under the study folder)."""
    return [
        sys.executable,
        "-m",
        "federation.deploy.link_process",
        "--study",
        str(Path(study).resolve()),
        "--",
        "--ssl-ca-certfile",
        str(certs.ca_certificate.resolve()),
        "--ssl-certfile",
        str(certs.server_certificate.resolve()),
        "--ssl-keyfile",
        str(certs.server_key.resolve()),
        "--enable-supernode-auth",
        "--disable-runtime-dependency-installation",
        "--database",
        str((Path(study) / LINK_DIR / "state.db").resolve()),
        "--host",
        host,
        "--port",
        str(port),
    ]


def prepare_serve(
    study: Path, certs_dir: Path | None, host: str, port: int, task_poll_s: float | None
) -> tuple[list[str], dict[str, str]]:
    """Check the study and TLS files, write ``superlink.toml``; return the command and its environment."""
    study = Path(study).resolve()
    for name in ("study.db", "request.json", "model.bundle"):
        if not (study / name).is_file():
            raise ValidationToolError(
                f"{study / name}: not found (a study folder holds study.db, request.json, model.bundle)"
            )
    certs = CertificatePaths.in_folder(certs_dir or study / "certs")
    certs.check()
    if not 1 <= port <= 65535:
        raise ValidationToolError("--port: must be from 1 to 65535")
    dial = "127.0.0.1" if host in ("0.0.0.0", "::", "") else host
    LinkSettings(f"{dial}:{port}", certs.ca_certificate.resolve()).write(study)
    home = study / LINK_DIR / "flwr-home"
    home.mkdir(parents=True, exist_ok=True)
    return serve_command(study, certs, host, port), flower_environment(home, task_poll_s)


def exec_superlink(command: list[str], env: dict[str, str]) -> None:  # pragma: no cover - replaces the process
    os.execve(command[0], command, env)


# --- Control API ------------------------------------------------------------------------------------------
@contextmanager
def control_client(settings: LinkSettings) -> Iterator[object]:
    """A Flower Control API client over TLS, closed on exit; transport failures become SuperLinkError."""
    from flwr.cli.cli_client_interceptor import CliClientHttpInterceptor
    from flwr.supercore.control import ControlHttpClient
    from flwr.supercore.interceptors import RuntimeVersionHttpInterceptor

    if not Path(settings.root_certificates).is_file():
        raise SuperLinkError(f"{settings.root_certificates}: CA certificate not found")
    client = ControlHttpClient.from_server_address(
        server_address=settings.address,
        insecure=False,
        root_certificates=Path(settings.root_certificates).read_bytes(),
        interceptors=[CliClientHttpInterceptor(), RuntimeVersionHttpInterceptor(component_name="flwr CLI")],
    )
    try:
        yield client
    except httpx.TransportError as exc:
        raise SuperLinkError(
            f"SuperLink at {settings.address} did not answer ({type(exc).__name__}); is `federation serve` running?"
        ) from None
    except httpx.HTTPStatusError as exc:
        raise SuperLinkError(
            f"SuperLink at {settings.address} refused {exc.request.url.path} (HTTP {exc.response.status_code})"
        ) from None
    finally:
        client.close()


def registered_nodes(settings: LinkSettings) -> dict[str, tuple[int, str]]:
    """Node-key fingerprint -> (node id, status) for every node the SuperLink knows."""
    from flwr.proto.control_pb2 import ListNodesRequest

    with control_client(settings) as client:
        response = client.ListNodes(ListNodesRequest())
    nodes = {}
    for info in response.nodes_info:
        fingerprint = fingerprint_of_reported(bytes(info.public_key))
        if fingerprint:
            nodes[fingerprint] = (int(info.node_id), str(info.status))
    return nodes


def register_node(settings: LinkSettings, node_key_pem: bytes, site_id: str) -> int:
    """Register a node key (``flwr supernode register`` through the Control API); return its node id."""
    from flwr.proto.control_pb2 import RegisterNodeRequest

    key = parse_node_key(node_key_pem, f"node key of {site_id}")
    known = registered_nodes(settings)
    if key.fingerprint in known:
        return known[key.fingerprint][0]
    with control_client(settings) as client:
        response = client.RegisterNode(request=RegisterNodeRequest(public_key=key.pem, name=site_id))
    if not response.node_id:
        raise SuperLinkError(f"SuperLink at {settings.address} did not register the node key of site {site_id!r}")
    return int(response.node_id)


def submit_run(settings: LinkSettings, bundle: AppBundle, run_config: dict[str, str | int | float | bool]) -> int:
    """Start a run of the ServerApp with our app bundle; return the run id."""
    from flwr.common.serde import fab_to_proto, user_config_to_proto
    from flwr.proto.control_pb2 import StartRunRequest
    from flwr.supercore.fab import Fab

    request = StartRunRequest(
        fab=fab_to_proto(Fab(bundle.sha256, bundle.content, {})), override_config=user_config_to_proto(run_config)
    )
    with control_client(settings) as client:
        response = client.StartRun(request)
    if not response.HasField("run_id"):
        raise SuperLinkError(f"SuperLink at {settings.address} did not start the run")
    return int(response.run_id)


def run_status(settings: LinkSettings, run_id: int) -> tuple[str, str, str]:
    """(status, sub-status, details) of a run, e.g. ("finished", "failed", "...")."""
    from flwr.proto.control_pb2 import ListRunsRequest

    with control_client(settings) as client:
        response = client.ListRuns(ListRunsRequest(run_id=run_id))
    run = response.run_dict.get(run_id)
    if run is None:
        return ("unknown", "", "")
    return (run.status.status, run.status.sub_status, run.status.details)


def stop_run(settings: LinkSettings, run_id: int) -> None:
    from flwr.proto.control_pb2 import StopRunRequest

    with control_client(settings) as client:
        client.StopRun(StopRunRequest(run_id=run_id))
