"""The sandbox HTTP server: a local stand-in for a Kubernetes API server.

`SandboxServer` serves the REST subset in `api.py` over plain HTTP on 127.0.0.1 with
a `ThreadingHTTPServer` (one thread per connection, chunked streaming for watches),
plus discovery, minimal OpenAPI v3, `/healthz`, fault injection
(`/_sandbox/faults`), `/_sandbox/compact` (forget the watch history), the request log
(`/_sandbox/requests`, with each request's authorization attributes), and
SelfSubjectAccessReview with deny rules as a fault mode (`/_sandbox/access`, access.py).
It is not a cluster: no scheduler, no kubelet, no admission webhooks, no authentication
(any bearer token is accepted), no RBAC (allow-all unless a deny rule says otherwise).

    with SandboxServer(load=["manifests/crd"]) as sb:
        sb.write_kubeconfig(tmp / "kubeconfig")
        apps = kubernetes.client.AppsV1Api(sb.api_client())
"""

from __future__ import annotations

import json
import select
import socket
import sys
import threading
import traceback
import time
import urllib.parse
from collections import deque
from collections.abc import Iterable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any, TextIO

from ratefit.controller.sandbox import access, discovery, protobuf
from ratefit.controller.sandbox import errors as E
from ratefit.controller.sandbox.api import Api, Request, Response
from ratefit.controller.sandbox.faults import Faults
from ratefit.controller.sandbox.manifests import read_manifests
from ratefit.controller.sandbox.store import Store
from ratefit.models.errors import InputError

#: namespaces every cluster has
DEFAULT_NAMESPACES = ("default", "kube-system", "kube-public", "kube-node-lease")
CONTEXT = "ratefit-sandbox"
TOKEN = "ratefit-sandbox-token"


class _HTTPServer(ThreadingHTTPServer):
    daemon_threads = True
    block_on_close = False
    allow_reuse_address = True

    def __init__(self, addr: tuple[str, int], sandbox: SandboxServer) -> None:
        self.sandbox = sandbox
        self.open_sockets: set[socket.socket] = set()
        self.sockets_lock = threading.Lock()
        super().__init__(addr, _Handler)

    def process_request(self, request: Any, client_address: Any) -> None:
        with self.sockets_lock:
            self.open_sockets.add(request)
        super().process_request(request, client_address)

    def shutdown_request(self, request: Any) -> None:
        with self.sockets_lock:
            self.open_sockets.discard(request)
        super().shutdown_request(request)


class _Handler(BaseHTTPRequestHandler):
    protocol_version = "HTTP/1.1"
    server: _HTTPServer

    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 - stdlib name
        return

    def setup(self) -> None:
        super().setup()
        # small JSON answers written as headers + body: without TCP_NODELAY, Nagle and
        # delayed ACKs add ~40 ms to every request
        self.connection.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

    def do_GET(self) -> None:  # noqa: N802 - stdlib names
        self._serve()

    def do_POST(self) -> None:  # noqa: N802
        self._serve()

    def do_PUT(self) -> None:  # noqa: N802
        self._serve()

    def do_PATCH(self) -> None:  # noqa: N802
        self._serve()

    def do_DELETE(self) -> None:  # noqa: N802
        self._serve()

    # --- plumbing -----------------------------------------------------------------------
    def _send_json(self, code: int, body: Any, headers: dict[str, str] | None = None) -> None:
        data = json.dumps(body).encode()
        self.send_response(code)
        self.send_header("Content-Type", "application/json")
        self.send_header("Content-Length", str(len(data)))
        self.send_header("Cache-Control", "no-cache, private")
        for k, v in (headers or {}).items():
            self.send_header(k, v)
        self.end_headers()
        self.wfile.write(data)

    def _send_error(self, err: E.ApiError) -> None:
        self._send_json(err.code, err.status(), err.headers)

    def _serve(self) -> None:
        """Answer one request; a bug in the sandbox becomes a 500 InternalError Status
        (and a traceback on stderr) instead of a dropped connection."""
        self._code = 0
        started = time.perf_counter()
        try:
            self._serve_one()
        except (BrokenPipeError, ConnectionResetError):
            self.close_connection = True
        except Exception as exc:  # noqa: BLE001 - report every server bug to the client
            traceback.print_exc(file=sys.stderr)
            try:
                self._send_error(E.ApiError(500, "InternalError",
                                            f"Internal error occurred: sandbox bug: {exc!r}"))
            except OSError:
                self.close_connection = True
        finally:
            log = self.server.sandbox.access_log
            if log is not None:
                print(f"{time.strftime('%H:%M:%S')} {self.command} {self.path} {self._code} "
                      f"{(time.perf_counter() - started) * 1e3:.1f}ms", file=log, flush=True)

    def send_response(self, code: int, message: str | None = None) -> None:
        self._code = code
        super().send_response(code, message)

    def _serve_one(self) -> None:
        sb = self.server.sandbox
        url = urllib.parse.urlsplit(self.path)
        path = url.path.rstrip("/") or "/"
        query = urllib.parse.parse_qs(url.query, keep_blank_values=True)
        length = int(self.headers.get("Content-Length") or 0)
        body = self.rfile.read(length) if length else b""
        headers = {k.lower(): v for k, v in self.headers.items()}
        req = Request(self.command, path, query, headers, body)
        attrs = access.request_attributes(self.command, path, query)
        entry = {"method": self.command, "path": path,
                 "query": {k: v[-1] for k, v in query.items()},
                 "contentType": headers.get("content-type", ""),
                 "time": time.time()}
        if not path.startswith("/_sandbox/"):
            entry["attributes"] = attrs.to_json()
        sb.log_request(entry)
        if path.startswith("/_sandbox/"):
            return self._private(req)
        watch = req.flag("watch")
        rule = sb.faults.take(self.command, path, watch=watch)
        drop = False
        if rule is not None:
            if rule.latency:
                time.sleep(rule.latency)
            if rule.conflict:
                parts = [p for p in path.split("/") if p]
                return self._send_error(E.conflict(parts[-2] if len(parts) > 1 else "",
                                                   "", parts[-1] if parts else "",
                                                   "the object has been modified; please apply "
                                                   "your changes to the latest version and try "
                                                   "again (injected fault)"))
            if rule.status is not None:
                if rule.status == 429:
                    return self._send_error(E.too_many_requests(rule.retry_after))
                err = E.for_status_code(rule.status, f"injected fault for {self.command} {path}")
                if rule.retry_after is not None:
                    err.headers["Retry-After"] = str(rule.retry_after)
                return self._send_error(err)
            drop = rule.drop_watch
        if self.command == "GET":
            doc = self._discovery(path)
            if doc is not None:
                return self._send_json(200, doc)
            if path in ("/healthz", "/readyz", "/livez"):
                data = b"ok"
                self.send_response(200)
                self.send_header("Content-Type", "text/plain")
                self.send_header("Content-Length", "2")
                self.end_headers()
                self.wfile.write(data)
                return
        if path == access.SSAR_PATH:
            return self._access_review(req)
        if attrs.is_resource:
            try:
                sb.access.check(attrs)
            except E.ApiError as err:
                return self._send_error(err)
        resp = sb.api.handle(req)
        if resp.stream is not None:
            return self._stream(resp, drop=drop)
        self._send_json(resp.code, resp.body, resp.headers)

    def _access_review(self, req: Request) -> None:
        """POST a SelfSubjectAccessReview: allowed unless a deny rule matches (access.py)."""
        sb = self.server.sandbox
        if req.method != "POST":
            return self._send_error(E.method_not_allowed(req.method, req.path))
        try:
            ctype = req.headers.get("content-type", "").split(";")[0].strip()
            if ctype == "application/vnd.kubernetes.protobuf":  # what kubectl auth can-i sends
                try:
                    body = protobuf.decode_ssar(req.body)
                except (ValueError, UnicodeDecodeError) as exc:
                    raise E.bad_request(f"the protobuf body is not a SelfSubjectAccessReview: {exc}") from exc
            else:
                body = sb.api._load_body(req)
            answer = access.review(body, sb.access)
        except E.ApiError as err:
            return self._send_error(err)
        self._send_json(201, answer)

    def _discovery(self, path: str) -> dict | None:
        sb = self.server.sandbox
        types = list(sb.store.types.values())
        if path == "/version":
            return discovery.VERSION
        if path == "/api":
            return discovery.api_versions(f"{sb.host}:{sb.port}")
        if path == "/apis":
            return discovery.api_group_list(types)
        if path == "/api/v1":
            return discovery.resource_list(types, "", "v1")
        if path == "/openapi/v3":
            return discovery.openapi_v3_index(types)
        parts = [p for p in path.split("/") if p]
        if parts[:2] == ["openapi", "v3"]:
            rest = parts[2:]
            if rest[:1] == ["api"] and len(rest) == 2:
                return discovery.openapi_v3_doc(types, "", rest[1])
            if rest[:1] == ["apis"] and len(rest) == 3:
                return discovery.openapi_v3_doc(types, rest[1], rest[2])
            return None
        if parts[:1] == ["apis"] and len(parts) == 2:
            return discovery.api_group(types, parts[1])
        if parts[:1] == ["apis"] and len(parts) == 3:
            return discovery.resource_list(types, parts[1], parts[2])
        return None

    def _stream(self, resp: Response, *, drop: bool) -> None:
        self.send_response(200)
        self.send_header("Content-Type", "application/json")
        self.send_header("Transfer-Encoding", "chunked")
        self.send_header("Cache-Control", "no-cache, private")
        self.end_headers()
        self.wfile.flush()
        assert resp.stream is not None
        try:
            for event in resp.stream:
                if event is None:
                    if self._client_gone():
                        break
                    continue
                line = json.dumps(event).encode() + b"\n"
                self.wfile.write(f"{len(line):X}\r\n".encode() + line + b"\r\n")
                self.wfile.flush()
                if drop:
                    break
            if drop:
                # cut the stream without the closing chunk, like a connection reset
                self.close_connection = True
                self.connection.shutdown(socket.SHUT_RDWR)
                return
            self.wfile.write(b"0\r\n\r\n")
            self.wfile.flush()
        except (BrokenPipeError, ConnectionResetError, OSError):
            self.close_connection = True
        finally:
            close = getattr(resp.stream, "close", None)
            if close:
                close()

    def _client_gone(self) -> bool:
        """True when the watching client has closed its end of the connection."""
        try:
            readable, _, _ = select.select([self.connection], [], [], 0)
            if not readable:
                return False
            return self.connection.recv(1, socket.MSG_PEEK) == b""
        except (OSError, ValueError):
            return True

    def _private(self, req: Request) -> None:
        sb = self.server.sandbox
        if req.path == "/_sandbox/faults":
            if req.method == "GET":
                return self._send_json(200, {"faults": [r.to_json() for r in sb.faults.rules]})
            if req.method == "DELETE":
                sb.faults.clear()
                return self._send_json(200, {"faults": []})
            if req.method == "POST":
                try:
                    spec = json.loads(req.body or b"{}")
                    specs = spec if isinstance(spec, list) else [spec]
                    rules = [sb.faults.add_json(s) for s in specs]
                except (ValueError, TypeError) as exc:
                    return self._send_error(E.bad_request(f"bad fault rule: {exc}"))
                return self._send_json(201, {"faults": [r.to_json() for r in rules]})
        if req.path == "/_sandbox/compact" and req.method == "POST":
            sb.store.compact()
            return self._send_json(200, {"compacted": sb.store.compacted})
        if req.path == "/_sandbox/access":
            if req.method == "GET":
                return self._send_json(200, {"deny": [r.to_json() for r in sb.access.rules]})
            if req.method == "DELETE":
                sb.access.clear()
                return self._send_json(200, {"deny": []})
            if req.method == "POST":
                try:
                    spec = json.loads(req.body or b"{}")
                    specs = spec if isinstance(spec, list) else [spec]
                    rules = [sb.access.deny_json(s) for s in specs]
                except (ValueError, TypeError) as exc:
                    return self._send_error(E.bad_request(f"bad deny rule: {exc}"))
                return self._send_json(201, {"deny": [r.to_json() for r in rules]})
        if req.path == "/_sandbox/requests" and req.method == "GET":
            return self._send_json(200, {"requests": list(sb.requests)})
        return self._send_error(E.ApiError(404, "NotFound", f"no sandbox endpoint {req.path}"))


class SandboxServer:
    """A local stand-in for a Kubernetes API server (see the module docstring)."""

    def __init__(self, *, host: str = "127.0.0.1", port: int = 0,
                 load: Iterable[str | Path] = (), history: int = 1000,
                 bookmark_interval: float = 1.0,
                 node_allocatable: dict[str, str] | None = None,
                 access_log: TextIO | None = None,
                 startup_seconds: float = 0.0) -> None:
        self.host = host
        self._port = port
        #: where to write one line per request (None: no access log)
        self.access_log = access_log
        self._load = list(load)
        self.store = Store(history=history)
        self.faults = Faults()
        #: deny rules (fault mode): SelfSubjectAccessReviews answer "no", requests get 403
        self.access = access.AccessRules()
        self._requests: deque[dict[str, Any]] = deque(maxlen=2000)
        self._requests_lock = threading.Lock()
        self._stopping = threading.Event()
        self.api = Api(self.store, bookmark_interval=bookmark_interval, stopping=self._stopping,
                       node_allocatable=node_allocatable, startup_seconds=startup_seconds)
        self._ticker: threading.Thread | None = None
        self._httpd: _HTTPServer | None = None
        self._thread: threading.Thread | None = None
        for ns in DEFAULT_NAMESPACES:
            self.create({"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": ns}})
        alloc = self.api.node_allocatable
        self.create({"apiVersion": "v1", "kind": "Node",
                     "metadata": {"name": "sandbox-node",
                                  "labels": {"kubernetes.io/hostname": "sandbox-node",
                                             "kubernetes.io/os": "linux"}},
                     "spec": {}})
        node = self.store.raw(("", "nodes"), "", "sandbox-node")
        if node is not None:   # the (absent) kubelet would report these
            import copy

            new = copy.deepcopy(node)
            new["status"] = {"capacity": dict(alloc), "allocatable": dict(alloc),
                             "conditions": [{"type": "Ready", "status": "True",
                                             "reason": "KubeletReady",
                                             "message": "ratefit sandbox stand-in node"}],
                             "nodeInfo": {"kubeletVersion": "v1.33.0+ratefit-sandbox",
                                          "kubeProxyVersion": "", "operatingSystem": "linux",
                                          "architecture": "amd64", "bootID": "sandbox",
                                          "containerRuntimeVersion": "none://sandbox",
                                          "kernelVersion": "n/a", "machineID": "sandbox",
                                          "osImage": "ratefit sandbox (no kubelet)",
                                          "systemUUID": "00000000-0000-0000-0000-000000000000"}}
            self.store.save(("", "nodes"), new, node)

    @property
    def requests(self) -> list[dict[str, Any]]:
        """A snapshot of the last 2000 requests served, oldest first: dicts with method,
        path, query (last value of each parameter), contentType, time and — except for
        ``/_sandbox/`` endpoints — ``attributes``, the authorization attributes an
        authorizer would see (verb, group, resource, subresource, namespace, name, or
        nonResourceURL; see access.py) — for assertions."""
        with self._requests_lock:
            return list(self._requests)

    def log_request(self, entry: dict[str, Any]) -> None:
        with self._requests_lock:
            self._requests.append(entry)

    def clear_requests(self) -> None:
        with self._requests_lock:
            self._requests.clear()

    # --- lifecycle ----------------------------------------------------------------------
    def start(self) -> SandboxServer:
        """Load the manifests, then serve in a background thread; returns self."""
        if self._load:
            self.load(self._load)
        self._httpd = _HTTPServer((self.host, self._port), self)
        self._thread = threading.Thread(target=self._httpd.serve_forever,
                                        kwargs={"poll_interval": 0.1},
                                        name="ratefit-sandbox", daemon=True)
        self._thread.start()
        if self.api.workloads.delayed:
            self._ticker = threading.Thread(target=self._tick_forever, name="ratefit-sandbox-pods",
                                            daemon=True)
            self._ticker.start()
        return self

    def _tick_forever(self) -> None:
        step = min(0.05, self.api.workloads.startup_seconds / 4)
        while not self._stopping.wait(step):
            self.api.workloads.tick()

    def stop(self) -> None:
        """Stop serving; ends open watches and connections."""
        self._stopping.set()
        self.store.close()
        if self._httpd is not None:
            self._httpd.shutdown()
            with self._httpd.sockets_lock:
                socks = list(self._httpd.open_sockets)
            for s in socks:
                try:
                    s.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass
            self._httpd.server_close()
            self._httpd = None
        if self._thread is not None:
            self._thread.join(timeout=5)
            self._thread = None
        if self._ticker is not None:
            self._ticker.join(timeout=5)
            self._ticker = None

    def serve_forever(self) -> None:
        """Block until interrupted (for the CLI)."""
        try:
            while self._thread is not None and self._thread.is_alive():
                self._thread.join(timeout=0.5)
        finally:
            self.stop()

    def __enter__(self) -> SandboxServer:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    @property
    def port(self) -> int:
        if self._httpd is None:
            raise RuntimeError("the sandbox is not started: call start() first")
        return self._httpd.server_address[1]

    @property
    def url(self) -> str:
        return f"http://{self.host}:{self.port}"

    # --- objects ------------------------------------------------------------------------
    def create(self, obj: dict[str, Any], *, source: str = "") -> dict[str, Any]:
        """Create an object in-process (through the same admission as HTTP requests)."""
        av, kind = obj.get("apiVersion", ""), obj.get("kind", "")
        rt = self.store.type_for_kind(av, kind)
        where = f"{source}: " if source else ""
        if rt is None:
            raise InputError(f"{where}the sandbox does not serve {kind} ({av}); load the CRD "
                             "that defines it first")
        md = obj.setdefault("metadata", {})
        base = "/api/v1" if not rt.group else f"/apis/{rt.group}/{rt.version}"
        if rt.namespaced:
            ns = md.get("namespace") or "default"
            if self.store.raw(("", "namespaces"), "", ns) is None:
                self.create({"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": ns}})
            base += f"/namespaces/{ns}"
        resp = self.api.handle(Request("POST", f"{base}/{rt.plural}", {},
                                       {"content-type": "application/json"},
                                       json.dumps(obj).encode()))
        if resp.code >= 300:
            raise InputError(f"{where}{kind} {md.get('name')!r} was refused: "
                             f"{resp.body.get('message')}")
        return resp.body

    def load(self, paths: Iterable[str | Path]) -> list[dict[str, Any]]:
        """Create every object of the given manifest files/directories (namespaces are
        created as needed); returns what was stored."""
        return [self.create(obj, source=src) for src, obj in read_manifests(list(paths))]

    # --- clients ------------------------------------------------------------------------
    def kubeconfig(self, *, namespace: str = "default") -> dict[str, Any]:
        return {
            "apiVersion": "v1",
            "kind": "Config",
            "clusters": [{"name": CONTEXT, "cluster": {"server": self.url}}],
            "users": [{"name": CONTEXT, "user": {"token": TOKEN}}],
            "contexts": [{"name": CONTEXT, "context": {"cluster": CONTEXT, "user": CONTEXT,
                                                      "namespace": namespace}}],
            "current-context": CONTEXT,
            "preferences": {},
        }

    def write_kubeconfig(self, path: str | Path, *, namespace: str = "default",
                         force: bool = False) -> Path:
        """Write a kubeconfig (context `ratefit-sandbox`) for kubectl and the Python client.
        An existing file is replaced only when the sandbox wrote it (or ``force``);
        otherwise `kubeconfig.KubeconfigExists` says so."""
        from ratefit.controller.sandbox import kubeconfig

        return kubeconfig.write(path, self.kubeconfig(namespace=namespace), CONTEXT, force=force)

    def api_client(self) -> Any:
        """A `kubernetes.client.ApiClient` configured for this sandbox."""
        from kubernetes import client

        cfg = client.Configuration()
        cfg.host = self.url
        cfg.api_key = {"authorization": TOKEN}
        cfg.api_key_prefix = {"authorization": "Bearer"}
        return client.ApiClient(cfg)
