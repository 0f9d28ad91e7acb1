"""Run a real single-node Apache Kafka broker on loopback.

The broker runs in KRaft mode (one JVM acting as both broker and
controller) from jars that Maven fetches once into a cache folder.  It is
meant for the test suite and for trying the service locally, never for
production use.

Examples
--------
>>> with LocalKafka() as kafka:                      # doctest: +SKIP
...     kafka.create_topic("edges", partitions=3)
...     print(kafka.bootstrap)
127.0.0.1:40123

From a shell::

    python -m ranktide.stream.broker fetch
    python -m ranktide.stream.broker start --port 9092 --data ./kafka-data
"""

from __future__ import annotations

import argparse
import atexit
import base64
import contextlib
import fcntl
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import uuid
import weakref
from pathlib import Path
from types import TracebackType
from typing import Iterator

from confluent_kafka import KafkaError, KafkaException
from confluent_kafka.admin import AdminClient, NewTopic

KAFKA_VERSION = "4.1.1"
SCALA_VERSION = "2.13"
# Kafka 4.x logs through slf4j 1.7 onto log4j 2; this binding must match
# the log4j-core version that kafka_2.13 pulls in.
LOG4J_VERSION = "2.24.3"

BROKER_MAIN = "kafka.Kafka"
STORAGE_TOOL = "kafka.tools.StorageTool"
JVM_HEAP = ("-Xms256m", "-Xmx512m")

_MARKER = "fetched.json"
_LOG_NAME = "broker.log"
_STATE_NAME = "ports.json"

_POM_TEMPLATE = """\
<project xmlns="http://maven.apache.org/POM/4.0.0">
  <modelVersion>4.0.0</modelVersion>
  <groupId>ranktide.local</groupId>
  <artifactId>kafka-broker-jars</artifactId>
  <version>0</version>
  <packaging>pom</packaging>
  <dependencies>
    <dependency>
      <groupId>org.apache.kafka</groupId>
      <artifactId>kafka_{scala}</artifactId>
      <version>{kafka}</version>
    </dependency>
    <dependency>
      <groupId>org.apache.logging.log4j</groupId>
      <artifactId>log4j-slf4j-impl</artifactId>
      <version>{log4j}</version>
    </dependency>
  </dependencies>
</project>
"""

_LOG4J_TEMPLATE = """\
status = error
appender.file.type = File
appender.file.name = file
appender.file.fileName = {log_file}
appender.file.append = true
appender.file.layout.type = PatternLayout
appender.file.layout.pattern = [%d] %p %m (%c)%n
rootLogger.level = WARN
rootLogger.appenderRef.file.ref = file
"""


# ---------------------------------------------------------------------------
# Fetching the jars
# ---------------------------------------------------------------------------


def cache_dir(version: str = KAFKA_VERSION) -> Path:
    """Return the folder that holds the broker's jars.

    Parameters
    ----------
    version : str
        Kafka version; part of the default folder name.

    Returns
    -------
    pathlib.Path
        ``$RANKTIDE_BROKER_CACHE`` if set, else
        ``~/.cache/ranktide/kafka-<version>``.
    """
    override = os.environ.get("RANKTIDE_BROKER_CACHE")
    if override:
        return Path(override).expanduser()
    return Path.home() / ".cache" / "ranktide" / f"kafka-{version}"


def _cached_libs(cache: Path, version: str) -> Path | None:
    """Return the libs folder if the marker says it is complete."""
    try:
        marker = json.loads((cache / _MARKER).read_text())
    except (OSError, ValueError):
        return None
    libs = cache / "libs"
    jars = marker.get("jars", [])
    if marker.get("version") != version or not jars:
        return None
    if not all((libs / jar).is_file() for jar in jars):
        return None
    return libs


@contextlib.contextmanager
def _locked(path: Path) -> Iterator[None]:
    """Hold an exclusive file lock so parallel runs fetch only once."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w") as handle:
        fcntl.flock(handle, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def _run_maven(pom_dir: Path, out_dir: Path) -> None:
    """Copy the runtime dependencies of the pom in ``pom_dir`` to ``out_dir``."""
    mvn = shutil.which("mvn")
    if mvn is None:
        raise RuntimeError("Maven ('mvn') is needed to fetch the Kafka jars but is not on PATH")
    cmd = [
        mvn, "-B", "-q", "dependency:copy-dependencies",
        "-DincludeScope=runtime", f"-DoutputDirectory={out_dir}",
    ]
    done = subprocess.run(cmd, cwd=pom_dir, capture_output=True, text=True)
    if done.returncode != 0:
        tail = "\n".join((done.stdout + done.stderr).splitlines()[-30:])
        raise RuntimeError(f"Maven could not fetch the Kafka jars:\n{tail}")


def fetch_jars(version: str = KAFKA_VERSION, cache: Path | None = None) -> Path:
    """Fetch the broker's jars with Maven unless they are cached already.

    Parameters
    ----------
    version : str
        Version of ``org.apache.kafka:kafka_2.13``.
    cache : pathlib.Path, optional
        Target folder; defaults to :func:`cache_dir`.

    Returns
    -------
    pathlib.Path
        Folder holding the jars, ready for ``java -cp <folder>/*``.

    Raises
    ------
    RuntimeError
        If Maven is missing or fails.
    """
    cache = cache or cache_dir(version)
    libs = _cached_libs(cache, version)
    if libs is not None:
        return libs
    with _locked(cache / ".lock"):
        libs = _cached_libs(cache, version)  # another process may have won
        if libs is not None:
            return libs
        print(f"fetching Kafka {version} jars with Maven into {cache} ...",
              file=sys.stderr, flush=True)
        started = time.monotonic()
        libs = _fetch_into(cache, version)
        print(f"fetched Kafka {version} jars in {time.monotonic() - started:.1f} s",
              file=sys.stderr, flush=True)
    return libs


def _fetch_into(cache: Path, version: str) -> Path:
    """Run Maven into a scratch folder, then move the jars into place."""
    libs = cache / "libs"
    with tempfile.TemporaryDirectory(prefix="fetch-", dir=cache) as scratch:
        scratch_dir = Path(scratch)
        pom = _POM_TEMPLATE.format(scala=SCALA_VERSION, kafka=version, log4j=LOG4J_VERSION)
        (scratch_dir / "pom.xml").write_text(pom)
        _run_maven(scratch_dir, scratch_dir / "libs")
        # Swap whole folders so a half-done fetch never looks complete.
        shutil.rmtree(libs, ignore_errors=True)
        (scratch_dir / "libs").rename(libs)
    jars = sorted(p.name for p in libs.glob("*.jar"))
    (cache / _MARKER).write_text(json.dumps({"version": version, "jars": jars}, indent=1))
    return libs


# ---------------------------------------------------------------------------
# Small helpers
# ---------------------------------------------------------------------------


def free_port() -> int:
    """Return a TCP port on 127.0.0.1 that is free right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _port_open(port: int) -> bool:
    """Tell whether something accepts connections on 127.0.0.1:``port``."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.settimeout(0.5)
        return sock.connect_ex(("127.0.0.1", port)) == 0


def random_cluster_id() -> str:
    """Return a cluster id in Kafka's format (URL-safe base64 of a UUID)."""
    while True:
        text = base64.urlsafe_b64encode(uuid.uuid4().bytes).rstrip(b"=").decode()
        if not text.startswith("-"):  # Kafka avoids ids that look like options
            return text


def java_executable() -> str:
    """Return the ``java`` launcher, preferring ``$JAVA_HOME``.

    Raises
    ------
    RuntimeError
        If no Java runtime can be found.
    """
    home = os.environ.get("JAVA_HOME")
    if home and (Path(home) / "bin" / "java").is_file():
        return str(Path(home) / "bin" / "java")
    found = shutil.which("java")
    if found is None:
        raise RuntimeError("Java 17+ ('java') is needed to run the Kafka broker but is not on PATH")
    return found


def server_properties(port: int, controller_port: int, log_dir: Path) -> str:
    """Return the broker configuration for a one-node KRaft cluster.

    Parameters
    ----------
    port : int
        Client port (PLAINTEXT listener).
    controller_port : int
        Port of the controller listener.
    log_dir : pathlib.Path
        Where the broker keeps partitions and the metadata log.

    Returns
    -------
    str
        Contents of a ``server.properties`` file.
    """
    settings = {
        "process.roles": "broker,controller",
        "node.id": "1",
        # A static voter set keeps the formatted storage valid even if the
        # controller port changes between runs on the same data folder.
        "controller.quorum.voters": f"1@127.0.0.1:{controller_port}",
        "controller.listener.names": "CONTROLLER",
        "listeners": f"PLAINTEXT://127.0.0.1:{port},CONTROLLER://127.0.0.1:{controller_port}",
        "advertised.listeners": f"PLAINTEXT://127.0.0.1:{port}",
        "inter.broker.listener.name": "PLAINTEXT",
        "listener.security.protocol.map": "PLAINTEXT:PLAINTEXT,CONTROLLER:PLAINTEXT",
        "log.dirs": str(log_dir),
        "num.partitions": "1",
        "auto.create.topics.enable": "false",
        "offsets.topic.replication.factor": "1",
        "offsets.topic.num.partitions": "1",  # fewer files, quicker first group join
        "transaction.state.log.replication.factor": "1",
        "transaction.state.log.min.isr": "1",
        "group.initial.rebalance.delay.ms": "0",
        "share.coordinator.state.topic.replication.factor": "1",
        "share.coordinator.state.topic.min.isr": "1",
    }
    return "".join(f"{key}={value}\n" for key, value in settings.items())


def _tail(path: Path, lines: int) -> str:
    """Return the last ``lines`` lines of a text file, or '' if missing."""
    try:
        text = path.read_text(errors="replace")
    except OSError:
        return ""
    return "\n".join(text.splitlines()[-lines:])


def _admin(bootstrap: str, timeout: float) -> AdminClient:
    """Return a quiet AdminClient for ``bootstrap``."""
    return AdminClient({
        "bootstrap.servers": bootstrap,
        "socket.timeout.ms": int(timeout * 1000),
        # Connection errors while the broker boots are expected; keep
        # librdkafka from printing them to stderr.
        "log_level": 0,
    })


# ---------------------------------------------------------------------------
# The broker
# ---------------------------------------------------------------------------

_RUNNING: "weakref.WeakSet[LocalKafka]" = weakref.WeakSet()


@atexit.register
def _stop_leftovers() -> None:
    """Stop brokers whose owner forgot, so no JVM outlives Python."""
    for broker in list(_RUNNING):
        broker.stop(keep_data=True, timeout=10)


class LocalKafka:
    """A single-node Kafka broker in KRaft mode, bound to 127.0.0.1.

    Parameters
    ----------
    port : int, optional
        Client port; a free one is picked if omitted.
    data_dir : str or pathlib.Path, optional
        Folder for configuration, log and storage.  If given it is kept on
        :meth:`stop` and reused (with its ports) by a later broker;
        if omitted a temporary folder is made and removed on :meth:`stop`.
    version : str
        Kafka version to run.

    Notes
    -----
    The JVM runs in its own process group, so Ctrl-C in a terminal reaches
    only Python, which then stops the broker cleanly.
    """

    def __init__(self, port: int | None = None, data_dir: str | Path | None = None,
                 version: str = KAFKA_VERSION) -> None:
        self.version = version
        self._owns_dir = data_dir is None
        self._root = Path(data_dir).resolve() if data_dir else None
        self._port = port
        self._controller_port: int | None = None
        self._proc: subprocess.Popen[bytes] | None = None
        self._lock = threading.Lock()

    # -- public API ---------------------------------------------------------

    @property
    def bootstrap(self) -> str:
        """str: ``bootstrap.servers`` value for clients, e.g. ``127.0.0.1:9092``."""
        if self._port is None:
            raise RuntimeError("the broker has no port yet; call start() first")
        return f"127.0.0.1:{self._port}"

    @property
    def port(self) -> int | None:
        """int or None: client port, known once the broker was started."""
        return self._port

    @property
    def data_dir(self) -> Path | None:
        """pathlib.Path or None: folder with config, log and storage."""
        return self._root

    @property
    def log_file(self) -> Path | None:
        """pathlib.Path or None: the broker's log (JVM output and WARN+ lines)."""
        return self._root / _LOG_NAME if self._root else None

    def is_running(self) -> bool:
        """Tell whether the broker's JVM is alive."""
        return self._proc is not None and self._proc.poll() is None

    def start(self, timeout: float = 120.0) -> "LocalKafka":
        """Start the broker and wait until it answers metadata requests.

        Restarting after ``stop(keep_data=True)`` reuses the same ports and
        data, so clients can reconnect and find their messages.

        Parameters
        ----------
        timeout : float
            Seconds to wait for the broker to answer.

        Returns
        -------
        LocalKafka
            ``self``, for chaining.

        Raises
        ------
        RuntimeError
            If the broker exits or does not answer in time; the message
            carries the tail of the broker's log.
        """
        with self._lock:
            if self.is_running():
                return self
            libs = fetch_jars(self.version)
            self._prepare_dir()
            self._choose_ports()
            self._write_config()
            self._format_storage(libs)
            self._launch(libs)
            try:
                self._wait_ready(timeout)
            except BaseException:
                self._terminate(timeout=10)
                raise
            _RUNNING.add(self)
        return self

    def stop(self, keep_data: bool = False, timeout: float = 30.0) -> None:
        """Stop the broker: SIGTERM, then SIGKILL after ``timeout`` seconds.

        Parameters
        ----------
        keep_data : bool
            Keep the data folder so :meth:`start` can bring the same broker
            back.  A folder passed by the caller is always kept.
        timeout : float
            Seconds to wait for a clean shutdown before killing the JVM.
        """
        with self._lock:
            self._terminate(timeout)
            _RUNNING.discard(self)
            if not keep_data and self._owns_dir and self._root is not None:
                shutil.rmtree(self._root, ignore_errors=True)
                self._root = None

    def restart(self, timeout: float = 120.0) -> "LocalKafka":
        """Stop the broker keeping its data, then start it again.

        Parameters
        ----------
        timeout : float
            Seconds to wait for the broker to answer again.

        Returns
        -------
        LocalKafka
            ``self``.
        """
        self.stop(keep_data=True)
        return self.start(timeout)

    def create_topic(self, name: str, partitions: int = 1, timeout: float = 30.0,
                     exist_ok: bool = False, config: dict[str, str] | None = None) -> None:
        """Create a topic and wait until all its partitions have a leader.

        Parameters
        ----------
        name : str
            Topic name.
        partitions : int
            Number of partitions.
        timeout : float
            Seconds to wait for the broker.
        exist_ok : bool
            Do not fail if the topic exists already.
        config : dict of str to str, optional
            Topic settings, e.g. ``{"retention.ms": "-1"}``.

        Raises
        ------
        confluent_kafka.KafkaException
            If the broker refuses the topic.
        RuntimeError
            If the partitions get no leader in time.
        """
        admin = _admin(self.bootstrap, timeout)
        topic = NewTopic(name, num_partitions=partitions, replication_factor=1,
                         config=config or {})
        future = admin.create_topics([topic], request_timeout=timeout)[name]
        try:
            future.result(timeout=timeout)
        except KafkaException as exc:
            already = exc.args[0].code() == KafkaError.TOPIC_ALREADY_EXISTS
            if not (exist_ok and already):
                raise
        self._wait_topic(admin, name, partitions, timeout)

    def log_tail(self, lines: int = 40) -> str:
        """Return the last ``lines`` lines of the broker's log.

        Parameters
        ----------
        lines : int
            How many lines to return.

        Returns
        -------
        str
            The lines, or ``''`` if there is no log (yet).
        """
        return _tail(self.log_file, lines) if self.log_file else ""

    def __enter__(self) -> "LocalKafka":
        return self.start()

    def __exit__(self, exc_type: type[BaseException] | None,
                 exc: BaseException | None, tb: TracebackType | None) -> None:
        self.stop()

    def __repr__(self) -> str:
        state = "running" if self.is_running() else "stopped"
        return f"LocalKafka(bootstrap=127.0.0.1:{self._port}, {state}, dir={self._root})"

    # -- steps of start() ---------------------------------------------------

    def _prepare_dir(self) -> None:
        """Make the data folder: a fresh temporary one unless given."""
        if self._root is None:
            self._root = Path(tempfile.mkdtemp(prefix="ranktide-kafka-"))
        self._root.mkdir(parents=True, exist_ok=True)

    def _choose_ports(self) -> None:
        """Reuse remembered ports, else pick free ones and remember them."""
        state_file = self._root / _STATE_NAME
        try:
            state = json.loads(state_file.read_text())
        except (OSError, ValueError):
            state = {}
        self._port = self._port or state.get("port") or free_port()
        self._controller_port = (self._controller_port or state.get("controller_port")
                                 or free_port())
        if self._controller_port == self._port:
            self._controller_port = free_port()
        state = {"port": self._port, "controller_port": self._controller_port}
        state_file.write_text(json.dumps(state))

    def _write_config(self) -> None:
        """Write server.properties and a quiet log4j2 config."""
        props = server_properties(self._port, self._controller_port, self._root / "data")
        (self._root / "server.properties").write_text(props)
        log4j = _LOG4J_TEMPLATE.format(log_file=self._root / _LOG_NAME)
        (self._root / "log4j2.properties").write_text(log4j)

    def _java(self, libs: Path, main: str, *args: str,
              heap: tuple[str, ...] = JVM_HEAP) -> list[str]:
        """Return the command line that runs ``main`` from the cached jars."""
        log4j = f"-Dlog4j2.configurationFile={self._root / 'log4j2.properties'}"
        return [java_executable(), *heap, log4j, "-cp", f"{libs}/*", main, *args]

    def _format_storage(self, libs: Path) -> None:
        """Format the KRaft storage once; later starts reuse it."""
        if (self._root / "data" / "meta.properties").exists():
            return
        cmd = self._java(libs, STORAGE_TOOL, "format", "-t", random_cluster_id(),
                         "-c", str(self._root / "server.properties"), heap=("-Xmx256m",))
        done = subprocess.run(cmd, capture_output=True, text=True)
        if done.returncode != 0:
            raise RuntimeError(f"formatting Kafka storage failed:\n{done.stdout}{done.stderr}")

    def _launch(self, libs: Path) -> None:
        """Start the broker JVM in its own process group."""
        cmd = self._java(libs, BROKER_MAIN, str(self._root / "server.properties"))
        with open(self._root / _LOG_NAME, "ab") as log:
            self._proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=log,
                                          stderr=subprocess.STDOUT, start_new_session=True)

    def _wait_ready(self, timeout: float) -> None:
        """Poll until the broker lists itself in a metadata answer."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self._proc.poll() is not None:
                raise RuntimeError(self._failure(f"exited with code {self._proc.returncode}"))
            # Probe the socket first: cheaper, and no client noise.
            if _port_open(self._port) and self._answers(min(5.0, deadline - time.monotonic())):
                return
            time.sleep(0.2)
        raise RuntimeError(self._failure(f"did not answer within {timeout:.0f} s"))

    def _answers(self, timeout: float) -> bool:
        """Tell whether the broker returns metadata naming itself."""
        if timeout <= 0:
            return False
        try:
            meta = _admin(self.bootstrap, timeout).list_topics(timeout=timeout)
        except KafkaException:
            return False
        return bool(meta.brokers)

    def _wait_topic(self, admin: AdminClient, name: str, partitions: int,
                    timeout: float) -> None:
        """Wait until metadata shows ``partitions`` partitions with leaders."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            topic = admin.list_topics(topic=name, timeout=timeout).topics.get(name)
            if (topic is not None and topic.error is None
                    and len(topic.partitions) >= partitions
                    and all(p.leader >= 0 for p in topic.partitions.values())):
                return
            time.sleep(0.1)
        raise RuntimeError(f"topic {name!r} got no partition leaders within {timeout:.0f} s")

    def _failure(self, what: str) -> str:
        """Return an error message with the broker log's tail."""
        return (f"Kafka broker on {self.bootstrap} {what}; "
                f"last lines of {self.log_file}:\n{self.log_tail()}")

    def _terminate(self, timeout: float) -> None:
        """SIGTERM the JVM's process group, SIGKILL it if it lingers."""
        proc = self._proc
        if proc is None:
            return
        if proc.poll() is None:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(proc.pid, signal.SIGTERM)
            try:
                proc.wait(timeout)
            except subprocess.TimeoutExpired:
                with contextlib.suppress(ProcessLookupError):
                    os.killpg(proc.pid, signal.SIGKILL)
                proc.wait()
        # Forget the process only once it is gone, so an interrupted stop
        # leaves it for the exit hook.
        self._proc = None


# ---------------------------------------------------------------------------
# Command line
# ---------------------------------------------------------------------------


def _topic_spec(text: str) -> tuple[str, int]:
    name, _, count = text.partition(":")
    if not name or (count and not count.isdigit()) or count == "0":
        raise argparse.ArgumentTypeError(f"expected NAME or NAME:PARTITIONS, got {text!r}")
    return name, int(count or 1)


def _parser(prog: str) -> argparse.ArgumentParser:
    """Build the argument parser for ``ranktide broker`` (or ``python -m ranktide.stream.broker``)."""
    parser = argparse.ArgumentParser(
        prog=prog,
        description=(f"Run a local single-node Apache Kafka {KAFKA_VERSION} broker "
                     "(KRaft mode, 127.0.0.1 only) for tests and trying ranktide out. "
                     "Needs Java 17+ and Maven; jars are cached in "
                     "~/.cache/ranktide/kafka-<version> or $RANKTIDE_BROKER_CACHE."),
    )
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    start = commands.add_parser(
        "start", help="run a broker in the foreground until Ctrl-C or SIGTERM",
        description="Run a broker in the foreground; print its bootstrap address "
                    "and keep running until Ctrl-C or SIGTERM, then stop cleanly.")
    start.add_argument("--port", type=int, default=None,
                       help="client port on 127.0.0.1 (default: the remembered one "
                            "for --data, else a free one)")
    start.add_argument("--data", metavar="DIR", default=None,
                       help="folder for config, log and storage; kept and reusable "
                            "(default: a temporary folder removed on exit)")
    start.add_argument("--topic", action="append", type=_topic_spec, metavar="NAME[:PARTITIONS]",
                       help="create this topic once the broker is up (default 1 partition); may be repeated")
    start.add_argument("--timeout", type=float, default=120.0,
                       help="seconds to wait for the broker to come up (default: 120)")
    commands.add_parser("fetch", help="only fetch the broker's jars with Maven",
                        description="Fetch the broker's jars into the cache and exit.")
    return parser


def _interrupt(signum: int, frame: object) -> None:
    """Turn SIGTERM into KeyboardInterrupt so cleanup code runs."""
    raise KeyboardInterrupt


def _serve(args: argparse.Namespace) -> int:
    """Run one broker until Ctrl-C/SIGTERM or until the JVM dies."""
    previous = signal.signal(signal.SIGTERM, _interrupt)
    broker = LocalKafka(port=args.port, data_dir=args.data)
    try:
        broker.start(timeout=args.timeout)
        for name, partitions in args.topic or []:
            broker.create_topic(name, partitions=partitions, exist_ok=True)
            print(f"topic: {name} ({partitions} partition{'s' if partitions > 1 else ''})", flush=True)
        print(f"bootstrap: {broker.bootstrap}", flush=True)
        print(f"data: {broker.data_dir}  log: {broker.log_file}", file=sys.stderr, flush=True)
        while broker.is_running():
            time.sleep(0.5)
        print(f"broker exited unexpectedly:\n{broker.log_tail()}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("stopping broker ...", file=sys.stderr, flush=True)
        return 0
    finally:
        broker.stop()
        signal.signal(signal.SIGTERM, previous)


def main(argv: list[str] | None = None, prog: str = "python -m ranktide.stream.broker") -> int:
    """Entry point of ``python -m ranktide.stream.broker`` and ``ranktide broker``.

    Parameters
    ----------
    argv : list of str, optional
        Arguments without the program name; defaults to ``sys.argv[1:]``.
    prog : str
        Program name shown in usage and help.

    Returns
    -------
    int
        Exit status.
    """
    args = _parser(prog).parse_args(argv)
    try:
        if args.command == "fetch":
            print(fetch_jars())
            return 0
        return _serve(args)
    except RuntimeError as exc:
        print(f"{prog}: error: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
