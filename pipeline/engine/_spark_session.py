"""Starting a Spark session for a build: the master URL, the settings, and a bounded wait.

A wrong master URL must cost the user one sentence and a few seconds, not a page of Java
after a minute: the URL is checked before Java starts, and a ``spark://`` master is probed over
TCP within the connect timeout. A master that accepts the connection but not the application
(not a Spark master, a version mismatch) is given up after the connect timeout plus
:data:`START_ALLOWANCE` for the whole session start (Spark's own standalone client retries for
about a minute, a fixed interval we cannot set).

Settings come from four places, later ones winning:

1. the tool's defaults (:data:`TOOL_DEFAULTS`), only for keys the user set nowhere;
2. the user's ``spark-defaults.conf`` and ``PYSPARK_SUBMIT_ARGS``, which Spark reads itself;
3. the study's ``spark: settings:``;
4. ``--spark-conf key=value`` on the command line.

:data:`REQUIRED` settings decide what the SQL means (ANSI casts, the time zone); they are
always applied, and a user setting that contradicts one is refused.
"""

from __future__ import annotations

import os
import re
import shlex
import socket
import threading
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.errors import EngineError

DEFAULT_MASTER = "local[*]"
DEFAULT_CONNECT_TIMEOUT = 30.0
# Seconds a session's start may take beyond the connect timeout: creating the Spark context
# takes 5-40 s on a busy two-core machine before the master is even asked (measured here).
START_ALLOWANCE = 60.0

# Settings the outputs depend on: ANSI mode so that CAST fails on bad input and TRY_CAST
# returns NULL, as on DuckDB (with ANSI off Spark's CAST silently returns NULL); UTC so that
# dates never shift; case-insensitive names as in DuckDB.
REQUIRED: dict[str, str] = {
    "spark.sql.ansi.enabled": "true",
    "spark.sql.session.timeZone": "UTC",
    "spark.sql.caseSensitive": "false",
}

# Defaults for a laptop-sized local run; each yields to any value the user set anywhere.
TOOL_DEFAULTS: dict[str, str] = {
    "spark.sql.shuffle.partitions": "4",
    "spark.ui.enabled": "false",
    "spark.ui.showConsoleProgress": "false",
    "spark.sql.execution.arrow.pyspark.enabled": "true",
    # Stage plans are long; Spark renders them for its listeners, which can exhaust the heap.
    "spark.sql.maxPlanStringLength": "65536",
    "spark.driver.memory": "2g",
}

# Keys whose values are never written to run.json or the manifest. Spark's own default
# spark.redaction.regex is "(?i)secret|password|token|access[.]?key" (from memory); we add
# credentials and the Hadoop S3 key names.
_SECRET = re.compile(r"(?i)secret|password|token|access[._-]?key|credential|\.key$")
REDACTED = "(redacted)"
# A value naming a folder of this machine (a log folder, a JVM option with a file) is not
# written down either: run.json and the manifest name no machine path.
_MACHINE_PATH = re.compile(r"^(/|~|[A-Za-z]:[\\/])|file:|=/")
MACHINE_PATH = "(a path on the build machine)"

# What spark-submit's own flags set (common practice: the flags documented by spark-submit).
_SUBMIT_FLAGS = {
    "--driver-memory": "spark.driver.memory",
    "--executor-memory": "spark.executor.memory",
    "--executor-cores": "spark.executor.cores",
    "--total-executor-cores": "spark.cores.max",
    "--num-executors": "spark.executor.instances",
    "--driver-cores": "spark.driver.cores",
}

_LOCAL = re.compile(r"^local(\[(\*|[1-9][0-9]*)(,[0-9]+)?\])?$")
_STANDALONE = re.compile(r"^spark://(.*)$")
_HOST_PORT = re.compile(r"^(\[[0-9a-fA-F:]+\]|[A-Za-z0-9_.-]+):([0-9]{1,5})$")
_OTHER = re.compile(r"^(yarn|k8s://\S+|local-cluster\[\d+,\d+,\d+\])$")


def is_local(master: str) -> bool:
    """Whether ``master`` runs everything in this process (``local``, ``local[N]``)."""
    return bool(_LOCAL.match(master))


def master_addresses(master: str) -> list[tuple[str, int]]:
    """Check a master URL's form; return the (host, port) pairs a ``spark://`` URL names.

    Raises:
        EngineError: Not a master URL Spark accepts, or a ``spark://`` URL without a port.
    """
    if is_local(master) or _OTHER.match(master):
        return []
    standalone = _STANDALONE.match(master)
    if not standalone:
        raise EngineError(
            f"'{master}' is not a Spark master URL; use local[*], local[N], "
            "spark://HOST:PORT, yarn or k8s://URL",
            code="spark-master-invalid",
        )
    addresses = []
    for part in standalone.group(1).split(","):
        found = _HOST_PORT.match(part)
        if not found or not 0 < int(found.group(2)) < 65536:
            raise EngineError(
                f"the Spark master URL {master} needs HOST:PORT after spark:// "
                f"(the standalone master's port, 7077 unless set otherwise), not '{part}'",
                code="spark-master-invalid",
            )
        addresses.append((found.group(1).strip("[]"), int(found.group(2))))
    return addresses


def probe_master(master: str, timeout: float) -> None:
    """Fail fast when no master of a ``spark://`` URL accepts a TCP connection.

    Raises:
        EngineError: One sentence naming the master and why it cannot be reached.
    """
    reasons = []
    for host, port in master_addresses(master):
        try:
            with socket.create_connection((host, port), timeout=timeout):
                return
        except TimeoutError:
            reasons.append(f"{host}:{port} did not answer within {timeout:g} s")
        except OSError as err:
            reasons.append(f"{host}:{port}: {err.strerror or err}")
    if reasons:
        raise EngineError(
            f"cannot reach the Spark master {master}: {'; '.join(reasons)}",
            code="spark-master-unreachable",
        )


def parse_settings(pairs: list[str] | tuple[str, ...], source: str) -> dict[str, str]:
    """``key=value`` texts (``--spark-conf``) as a dict; keys must be Spark's (``spark.``).

    Raises:
        EngineError: A text without ``=`` or a key that is not a Spark setting.
    """
    settings: dict[str, str] = {}
    for pair in pairs:
        key, sep, value = pair.partition("=")
        key = key.strip()
        if not sep or not key.startswith("spark.") or not value:
            raise EngineError(
                f"{source} takes spark.KEY=VALUE, not '{pair}'", code="spark-setting-invalid"
            )
        settings[key] = value
    return settings


def _properties(path: Path) -> dict[str, str]:
    """The ``key value`` lines of a Java-style properties file such as spark-defaults.conf."""
    found = {}
    for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
        text = line.strip()
        if not text or text.startswith(("#", "!")):
            continue
        parts = re.split(r"\s*[=:\s]\s*", text, maxsplit=1)
        if len(parts) == 2:
            found[parts[0]] = parts[1]
    return found


def _spark_home() -> Path | None:
    if os.environ.get("SPARK_HOME"):
        return Path(os.environ["SPARK_HOME"])
    try:
        import pyspark
    except ImportError:  # pragma: no cover - the engine refuses earlier
        return None
    return Path(pyspark.__file__).parent


def user_settings(environ: Mapping[str, str] | None = None) -> dict[str, str]:
    """The Spark settings the user made outside ascertain: spark-defaults.conf and submit args.

    Read as spark-submit reads them: ``--properties-file`` or ``spark-defaults.conf`` in
    ``SPARK_CONF_DIR`` (else ``SPARK_HOME/conf``), then ``PYSPARK_SUBMIT_ARGS``'s ``--conf``
    and resource flags over it. Only the keys matter here: a key set there is not given a
    tool default, so Spark keeps the user's value.
    """
    environ = os.environ if environ is None else environ
    words = shlex.split(environ.get("PYSPARK_SUBMIT_ARGS", ""))
    properties: Path | None = None
    submitted: dict[str, str] = {}
    for i, word in enumerate(words):
        follows = words[i + 1] if i + 1 < len(words) else ""
        if word in ("--conf", "-c") and "=" in follows:
            key, _, value = follows.partition("=")
            submitted[key] = value
        elif word.startswith("--conf=") and "=" in word[7:]:
            key, _, value = word[7:].partition("=")
            submitted[key] = value
        elif word in _SUBMIT_FLAGS and follows:
            submitted[_SUBMIT_FLAGS[word]] = follows
        elif word == "--properties-file" and follows:
            properties = Path(follows)
    if properties is None:
        conf_dir = environ.get("SPARK_CONF_DIR")
        home = Path(environ["SPARK_HOME"]) if environ.get("SPARK_HOME") else _spark_home()
        folder = Path(conf_dir) if conf_dir else (home / "conf" if home else None)
        properties = folder / "spark-defaults.conf" if folder else None
    defaults = _properties(properties) if properties and properties.is_file() else {}
    return {**defaults, **submitted}


@dataclass(frozen=True)
class SessionRequest:
    """Everything needed to start a session, and to say afterwards what was asked for."""

    master: str = DEFAULT_MASTER
    settings: Mapping[str, str] | None = None
    """The study's settings with the command line's over them."""
    connect_timeout: float = DEFAULT_CONNECT_TIMEOUT

    def passed(self, user: Mapping[str, str]) -> dict[str, str]:
        """The settings given to Spark: tool defaults the user did not set, theirs, required.

        Raises:
            EngineError: A study or command-line setting contradicts a required one.
        """
        explicit = dict(self.settings or {})
        for key, value in explicit.items():
            if key in REQUIRED and value.strip().lower() != REQUIRED[key].lower():
                raise EngineError(
                    f"{key}={value} would change what the study's SQL means; "
                    f"ascertain runs with {key}={REQUIRED[key]}",
                    code="spark-setting-refused",
                )
        defaults = {k: v for k, v in TOOL_DEFAULTS.items() if k not in user}
        return {**defaults, **explicit, **REQUIRED}

    def watched(self, user: Mapping[str, str]) -> list[str]:
        """The keys whose values in effect run.json records."""
        return sorted({*TOOL_DEFAULTS, *REQUIRED, *user, *(self.settings or {})})


def redact(settings: Mapping[str, str]) -> dict[str, str]:
    """Settings safe to write down, keys sorted: secrets and machine paths replaced."""
    shown = {}
    for key, value in sorted(settings.items()):
        if _SECRET.search(key):
            shown[key] = REDACTED
        elif _MACHINE_PATH.search(value):
            shown[key] = MACHINE_PATH
        else:
            shown[key] = value
    return shown


def safe_master(master: str) -> str:
    """The master URL without any ``user:password@`` part."""
    return re.sub(r"//[^/@]*@", "//", master)


def _stop_gateway_process() -> None:
    """Kill the JVM pyspark started for this session (the spark-submit process, by its id)."""
    from pyspark import SparkContext

    process = getattr(SparkContext._gateway, "proc", None)
    if process is not None and process.poll() is None:
        process.kill()
        process.wait(timeout=10)


def _forget_gateway() -> None:
    """Stop the JVM pyspark started for us and forget it, so nothing of it outlives the error."""
    from pyspark import SparkContext

    _stop_gateway_process()
    SparkContext._gateway = None
    SparkContext._jvm = None
    SparkContext._active_spark_context = None


def start_session(request: SessionRequest, passed: Mapping[str, str]) -> Any:
    """A new SparkSession on ``request.master`` with ``passed``, within the connect timeout.

    Java is started first (local work, not counted); then the context's start and the
    master's acceptance get ``connect_timeout`` + :data:`START_ALLOWANCE` seconds. On failure
    the JVM is stopped.

    Raises:
        EngineError: pyspark is missing, or the master is unreachable or refused the session.
    """
    try:
        from pyspark import SparkConf, SparkContext
        from pyspark.sql import SparkSession
    except ImportError as err:
        raise EngineError(
            "the Spark engine needs pyspark: pip install 'ascertain[spark]'", code="spark-missing"
        ) from err
    probe_master(request.master, request.connect_timeout)
    conf = SparkConf().setMaster(request.master).setAppName("ascertain")
    conf.setAll(list(passed.items()))
    try:
        # Launches the JVM with these settings as --conf (driver memory must be known then).
        SparkContext._ensure_initialized(conf=conf)
    except Exception as err:
        raise EngineError(
            f"Java for Spark did not start: {str(err).strip()[:300]}", code="java-failed"
        ) from err
    # The wait runs in this thread (so the session is this thread's active one, as after a
    # plain getOrCreate); a timer stops the JVM if the master keeps it waiting too long, which
    # ends the wait with an error.
    fired = threading.Event()

    def give_up() -> None:
        fired.set()
        _stop_gateway_process()

    waited = request.connect_timeout + START_ALLOWANCE
    timer = threading.Timer(waited, give_up)
    timer.daemon = True
    timer.start()
    try:
        return SparkSession.builder.config(conf=conf).getOrCreate()
    except Exception as err:
        timer.cancel()
        _forget_gateway()
        master = safe_master(request.master)
        if fired.is_set():
            raise EngineError(
                f"the Spark master {master} did not accept the application within {waited:g} s "
                "(is it a Spark master of the same version as pyspark?); set spark: "
                "connect_timeout_seconds to wait longer",
                code="spark-master-timeout",
            ) from err
        raise EngineError(
            f"the Spark master {master} refused: {_one_line(err)}", code="spark-master-refused"
        ) from err
    finally:
        timer.cancel()


def _one_line(err: BaseException) -> str:
    try:
        text = str(err)
    except Exception:  # a Java error's text is fetched from a JVM that may have stopped
        return type(err).__name__
    lines = [line.strip() for line in text.splitlines() if line.strip()]
    for line in lines:
        if "Exception:" in line or "Error:" in line:
            return line.split("Exception:", 1)[-1].split("Error:", 1)[-1].strip()[:300]
    return (lines[0] if lines else type(err).__name__)[:300]


def settings_in_effect(session: Any, keys: list[str]) -> dict[str, str]:
    """The values the running session holds for ``keys`` (unset keys left out), redacted."""
    conf = session.sparkContext.getConf()
    found = {}
    for key in keys:
        value = session.conf.get(key, None) if key.startswith("spark.sql.") else None
        value = value if value is not None else conf.get(key, None)
        if value is not None:
            found[key] = str(value)
    return redact(found)
