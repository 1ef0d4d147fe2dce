"""Start workflow steps fast: a warm process forks each light job.

Most of the workflow's jobs are small (validate an events file, compute one contrast from a
stored fit, threshold one map) and finish in well under a second, but a fresh Python process
needs about a second just to import numpy, pandas, nibabel, h5py, matplotlib and scipy. So
the light rules run their step through this module (``python -m glmsteps.launch STEP ...``,
the command that ``rules/common.smk: step_command`` writes):

1. The *client* (this module's :func:`main`, which imports only the standard library) reads
   the job from its command line: the named inputs, outputs, params and wildcards as
   Snakemake formats them.
2. It hands the job, with its stdin, stdout and stderr, to a *warm server* over a Unix socket.
   The server imported every step once; it forks a child per job, so each job still runs in
   a process of its own (its own warnings, logging, memory), starting from warm modules.
3. The client waits for the child's exit status and exits with it. SIGTERM or SIGINT sent to
   the client are forwarded to the child; if the client itself dies, the server stops the
   child (SIGTERM, then SIGKILL), so an interrupted workflow leaves no job running.

When no server answers, the client starts one in the background (for the jobs that follow)
and runs its own job in-process: results never depend on which path ran them. The server
lives in ``$XDG_RUNTIME_DIR`` (or the temporary folder), under a name derived from the
Python executable and the glmsteps source files, so a changed glmsteps never serves a job
with old code; it exits after :data:`IDLE_SECONDS` without work. ``GLMSTEPS_LAUNCH=direct``
turns the server off (every job in its own fresh process), as does running inside a SLURM
job, where processes do not outlive their job step.
"""

from __future__ import annotations

import ast
import array
import hashlib
import json
import os
import selectors
import signal
import socket
import struct
import subprocess
import sys
import tempfile
import time
import traceback
from dataclasses import asdict, dataclass, field
from pathlib import Path
from types import SimpleNamespace
from typing import Any

#: Seconds a server waits for work before it exits.
IDLE_SECONDS = 60.0
#: Seconds between SIGTERM and SIGKILL when a client vanished while its job ran.
KILL_GRACE_SECONDS = 10.0
#: Separator between the value groups on the command line (no path is ever exactly this).
SEPARATOR = ":::"
#: Module of each step's ``run`` function.
STEP_MODULES: dict[str, str] = {
    "validate_events": "glmsteps.jobs.validate_events",
    "select_confounds": "glmsteps.jobs.select_confounds",
    "build_design": "glmsteps.jobs.build_design",
    "fit": "glmsteps.jobs.fit",
    "contrast": "glmsteps.jobs.contrast",
    "combine_runs": "glmsteps.jobs.combine_runs",
    "threshold": "glmsteps.jobs.threshold",
    "group_model": "glmsteps.jobs.group_model",
    "group_permutation": "glmsteps.jobs.group_permutation",
    "index": "glmsteps.jobs.index",
    "report": "glmsteps.jobs.report",
}
#: Modules the server imports before it serves (what the light steps need).
WARM_MODULES: tuple[str, ...] = ("numpy", "scipy.special", "scipy.stats", "scipy.ndimage", "pandas", "nibabel",
                                 "h5py", "matplotlib", "matplotlib.figure", "matplotlib.backends.backend_agg")
#: Environment variable in which the client hands its own start time (seconds since the epoch) to
#: the forked job, whose process started later (read by glmsteps.jobs.common.process_start_time).
PROCESS_START_VARIABLE = "GLMSTEPS_PROCESS_START"
_LENGTH = struct.Struct("!I")


class LaunchError(Exception):
    """The command line of a launch is malformed (a bug in the rule, not a user error)."""


@dataclass(frozen=True)
class JobRequest:
    """One job as the client read it from its command line.

    Attributes
    ----------
    step : str
        Key of :data:`STEP_MODULES`.
    inputs, outputs, params, wildcards : dict
        Named values (a list input stays a list).
    log : str
        The job's log file ('' for none).
    threads : int
    cwd : str
        Working folder of the job.
    env : dict of str
        Environment of the job.
    """

    step: str
    inputs: dict[str, Any]
    outputs: dict[str, Any]
    params: dict[str, Any]
    wildcards: dict[str, Any]
    log: str
    threads: int
    cwd: str = ""
    env: dict[str, str] = field(default_factory=dict)


def _regroup(names: dict[str, tuple[int, int | None]], values: list[str]) -> dict[str, Any]:
    """Snakemake's named-list layout (name -> (start, end)) applied to its flat values."""
    out: dict[str, Any] = {}
    for name, (start, end) in names.items():
        out[name] = values[start] if end is None else values[start:end]
    return out


def parse_request(argv: list[str]) -> JobRequest:
    """Read a job from the launch command line.

    Parameters
    ----------
    argv : list of str
        ``STEP THREADS INPUT_NAMES OUTPUT_NAMES PARAM_NAMES ::: inputs... ::: outputs...
        ::: params... ::: wildcards ::: log``, as :func:`command_template` has Snakemake
        format it: the ``*_NAMES`` are the reprs of Snakemake's ``Namedlist._names``
        (name -> (start, end)), each param is the repr of its value, and the wildcards are
        Snakemake's ``name=value,name=value`` (our wildcard values never hold ``,`` ``=``
        or spaces: rules/common.smk constrains them).

    Raises
    ------
    LaunchError
    """
    try:
        step, threads, *name_reprs = argv[:5]
        groups: list[list[str]] = [[]]
        for arg in argv[5:]:
            if arg == SEPARATOR:
                groups.append([])
            else:
                groups[-1].append(arg)
        if len(name_reprs) != 3 or len(groups) != 6 or groups[0] or len(groups[5]) > 1:
            raise ValueError("expected 5 leading arguments and 5 value groups")
        names = [ast.literal_eval(text) for text in name_reprs]
        inputs, outputs, params = (_regroup(n, g) for n, g in zip(names, groups[1:4]))
        params = {k: ast.literal_eval(v) if isinstance(v, str) else [ast.literal_eval(x) for x in v]
                  for k, v in params.items()}
        wildcards = dict(item.split("=", 1) for text in groups[4] for item in text.split(",") if item)
        return JobRequest(step=step, inputs=inputs, outputs=outputs, params=params, wildcards=wildcards,
                          log=groups[5][0] if groups[5] else "", threads=int(threads))
    except (ValueError, SyntaxError, TypeError, IndexError) as exc:
        raise LaunchError(f"glmsteps.launch: malformed command line ({exc}): {argv!r}") from exc


def command_template(step: str, python: str | None = None, warm: bool = True) -> str:
    """The shell command of a rule that runs ``step`` through the launcher.

    Parameters
    ----------
    step : str
        Key of :data:`STEP_MODULES`.
    python : str, optional
        The interpreter as a shell word, used as given (e.g. ``"$GLMSTEPS_PYTHON"``, which
        the workflow sets to its own interpreter, so that a job's recorded code does not
        name the environment's path); default: the running interpreter's path, quoted.
    warm : bool
        Through the warm server (default), or in the client's own process (``--direct``:
        a heavy step whose resources Snakemake's benchmark and a cluster should see).

    Returns
    -------
    str
        A Snakemake shell template: Snakemake fills in the job's named inputs,
        outputs, params, wildcards and log when it runs the job.
    """
    import shlex

    if step not in STEP_MODULES:
        raise LaunchError(f"glmsteps.launch: unknown step {step!r}; known: {sorted(STEP_MODULES)}")
    names = " ".join(f"{{{kind}._names:q}}" for kind in ("input", "output", "params"))
    values = f" {SEPARATOR} ".join(("{input:q}", "{output:q}", "{params:q}", "{wildcards}", "{log:q}"))
    direct = "" if warm else "--direct "
    return (f"{python or shlex.quote(sys.executable)} -m glmsteps.launch {direct}{step} {{threads}} {names} "
            f"{SEPARATOR} {values}")


def run_in_process(request: JobRequest) -> int:
    """Run a job in this process, as a Snakemake script would; return its exit code."""
    import importlib

    from .jobs.common import run_script

    module = importlib.import_module(STEP_MODULES[request.step])
    smk = SimpleNamespace(input=request.inputs, output=request.outputs, params=request.params,
                          wildcards=request.wildcards, log=[request.log] if request.log else [],
                          threads=request.threads)
    try:
        run_script(module.run, smk)
    except SystemExit as exc:
        return exc.code if isinstance(exc.code, int) else 1
    except BaseException:  # noqa: BLE001 - the traceback goes to the job's stderr, as a script's would
        traceback.print_exc()
        return 1
    return 0


# ---------------------------------------------------------------------------
# where the server lives
# ---------------------------------------------------------------------------

def code_fingerprint() -> str:
    """sha256 (16 hex digits) of the interpreter and every glmsteps source file's path, size and mtime."""
    package = Path(__file__).resolve().parent
    digest = hashlib.sha256(f"{sys.executable}\0{sys.version}\0{package}".encode())
    for path in sorted(package.rglob("*.py")):
        stat = path.stat()
        digest.update(f"{path.relative_to(package)}\0{stat.st_size}\0{stat.st_mtime_ns}\0".encode())
    return digest.hexdigest()[:16]


def socket_path() -> Path:
    """The server's socket for this interpreter and this glmsteps source."""
    base = Path(os.environ.get("XDG_RUNTIME_DIR") or tempfile.gettempdir()) / f"glmsteps-{os.getuid()}"
    base.mkdir(mode=0o700, exist_ok=True)
    return base / f"launch-{code_fingerprint()}.sock"


def warm_enabled() -> bool:
    """Whether jobs go through a warm server (not with ``GLMSTEPS_LAUNCH=direct``, nor inside SLURM)."""
    mode = os.environ.get("GLMSTEPS_LAUNCH", "")
    if mode in ("direct", "warm"):
        return mode == "warm"
    return "SLURM_JOB_ID" not in os.environ


# ---------------------------------------------------------------------------
# client
# ---------------------------------------------------------------------------

def _send(sock: socket.socket, payload: dict[str, Any], fds: list[int] | None = None) -> None:
    data = json.dumps(payload).encode()
    message = _LENGTH.pack(len(data)) + data
    if fds:
        sock.sendmsg([message], [(socket.SOL_SOCKET, socket.SCM_RIGHTS, array.array("i", fds))])
    else:
        sock.sendall(message)


def _start_server(path: Path) -> None:
    """Start a server for ``path`` in the background (it ignores the start if one already runs)."""
    env = dict(os.environ)
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        env[var] = "1"  # the server forks its jobs: no BLAS thread pool may exist in it
    subprocess.Popen([sys.executable, "-m", "glmsteps.launch", "--serve", str(path)], env=env,
                     stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                     start_new_session=True, close_fds=True)


def start_server() -> None:
    """Start the warm server for this code in the background, when warm mode is on (idempotent).

    The Snakefile calls it when a run starts, so that the server has imported everything by
    the time the first light jobs run (otherwise they run cold until it is ready).
    """
    if not warm_enabled():
        return
    path = socket_path()
    probe = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        probe.connect(str(path))
    except OSError:
        _start_server(path)
    finally:
        probe.close()


def run_warm(request: JobRequest, path: Path) -> int | None:
    """Run a job through the server at ``path``; ``None`` when no server answers."""
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        sock.connect(str(path))
    except OSError:
        sock.close()
        return None
    child: list[int] = []

    def forward(signum: int, frame: Any) -> None:
        if child:
            os.kill(child[0], signum)

    previous = {s: signal.signal(s, forward) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        try:
            _send(sock, asdict(request), [0, 1, 2])
        except OSError:
            return None  # the server is shutting down: nothing started
        reader = sock.makefile("r")
        for line in reader:
            message = json.loads(line)
            if "pid" in message:
                child.append(int(message["pid"]))
            elif "exit" in message:
                return int(message["exit"])
        if not child:
            return None  # the server closed before it started the job (it was going idle)
        sys.stderr.write("glmsteps.launch: the warm server stopped while the job ran; rerun the workflow\n")
        return 1
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
        sock.close()


def own_start_time() -> float:
    """This process's start (seconds since the epoch), from ``/proc``; now where there is none."""
    try:
        with open("/proc/self/stat", encoding="ascii") as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
        with open("/proc/uptime", encoding="ascii") as fh:
            uptime_s = float(fh.read().split()[0])
        return time.time() - uptime_s + int(fields[19]) / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return time.time()


def main(argv: list[str] | None = None) -> int:
    """Client entry point: run one job (warm when possible); return its exit code."""
    args = list(sys.argv[1:] if argv is None else argv)
    if args[:1] == ["--serve"]:
        serve(Path(args[1]))
        return 0
    direct = args[:1] == ["--direct"]
    request = parse_request(args[1:] if direct else args)
    if request.step not in STEP_MODULES:
        raise LaunchError(f"glmsteps.launch: unknown step {request.step!r}; known: {sorted(STEP_MODULES)}")
    env = dict(os.environ)
    # the job's start-up overhead counts from this process's start (glmsteps.jobs.common.run_script)
    env[PROCESS_START_VARIABLE] = f"{own_start_time():.6f}"
    request = JobRequest(**{**asdict(request), "cwd": os.getcwd(), "env": env})
    if not direct and warm_enabled():
        path = socket_path()
        code = run_warm(request, path)
        if code is not None:
            return code
        _start_server(path)
    return run_in_process(request)


# ---------------------------------------------------------------------------
# server
# ---------------------------------------------------------------------------

def _receive(conn: socket.socket) -> tuple[dict[str, Any], list[int]]:
    """One request and the file descriptors sent with it."""
    fds = array.array("i")
    data, ancillary, _, _ = conn.recvmsg(1 << 16, socket.CMSG_SPACE(3 * fds.itemsize))
    for level, kind, payload in ancillary:
        if level == socket.SOL_SOCKET and kind == socket.SCM_RIGHTS:
            fds.frombytes(payload[: len(payload) - len(payload) % fds.itemsize])
    if len(data) < _LENGTH.size:
        raise OSError("short request")
    (length,) = _LENGTH.unpack_from(data)
    body = data[_LENGTH.size:]
    while len(body) < length:
        more = conn.recv(length - len(body))
        if not more:
            raise OSError("request cut short")
        body += more
    return json.loads(body), list(fds)


def _max_fd() -> int:
    try:
        import resource

        return min(int(resource.getrlimit(resource.RLIMIT_NOFILE)[0]), 65536)
    except (ImportError, ValueError, OSError):
        return 4096


def _child(request: dict[str, Any], fds: list[int], listener: socket.socket, selector: selectors.BaseSelector) -> None:
    """In the forked child: become the job's process and run it (never returns)."""
    code = 1
    try:
        selector.close()
        listener.close()
        for target, fd in zip((0, 1, 2), fds):
            os.dup2(fd, target)
        os.closerange(3, _max_fd())  # the server's sockets and pipes, other clients' connections
        for s in (signal.SIGTERM, signal.SIGINT, signal.SIGCHLD):
            signal.signal(s, signal.SIG_DFL)
        signal.set_wakeup_fd(-1)
        os.chdir(request["cwd"])
        os.environ.clear()
        os.environ.update(request["env"])
        sys.argv = ["glmsteps.launch", request["step"]]
        fields = {k: request[k] for k in ("step", "inputs", "outputs", "params", "wildcards", "log", "threads")}
        code = run_in_process(JobRequest(**fields, cwd=request["cwd"]))
    except BaseException:  # noqa: BLE001 - report and exit, never return into the server loop
        traceback.print_exc()
    finally:
        try:
            sys.stdout.flush()
            sys.stderr.flush()
        finally:
            os._exit(code)


def serve(path: Path) -> None:
    """Serve jobs on the Unix socket ``path`` until idle for :data:`IDLE_SECONDS`."""
    import fcntl
    import importlib

    lock = open(f"{path}.lock", "w")  # noqa: SIM115 - held for the server's life
    try:
        fcntl.flock(lock, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return  # another server for this code is starting or running
    for name in WARM_MODULES + tuple(sorted(set(STEP_MODULES.values()))):
        try:
            importlib.import_module(name)
        except ImportError:
            pass  # a step that is not installed is imported (and reported) by its job
    path.unlink(missing_ok=True)
    listener = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    listener.bind(str(path))
    listener.listen(64)
    wake_r, wake_w = os.pipe()
    os.set_blocking(wake_w, False)
    signal.set_wakeup_fd(wake_w)
    signal.signal(signal.SIGCHLD, lambda *_: None)
    selector = selectors.DefaultSelector()
    selector.register(listener, selectors.EVENT_READ, "accept")
    selector.register(wake_r, selectors.EVENT_READ, "wake")
    running: dict[int, socket.socket] = {}
    kill_at: dict[int, float] = {}
    last_work = time.monotonic()
    try:
        while running or time.monotonic() - last_work < IDLE_SECONDS:
            for key, _ in selector.select(timeout=1.0):
                if key.data == "accept":
                    conn, _ = listener.accept()
                    try:
                        request, fds = _receive(conn)
                    except (OSError, ValueError):
                        conn.close()
                        continue
                    pid = os.fork()
                    if pid == 0:
                        _child(request, fds, listener, selector)
                    for fd in fds:
                        os.close(fd)
                    conn.sendall((json.dumps({"pid": pid}) + "\n").encode())
                    running[pid] = conn
                    selector.register(conn, selectors.EVENT_READ, pid)
                elif key.data == "wake":
                    os.read(wake_r, 4096)
                elif isinstance(key.data, int):  # the client closed its end: it was killed
                    pid = key.data
                    selector.unregister(key.fileobj)
                    if pid in running and pid not in kill_at:
                        os.kill(pid, signal.SIGTERM)
                        kill_at[pid] = time.monotonic() + KILL_GRACE_SECONDS
            for pid, due in list(kill_at.items()):
                if time.monotonic() > due and pid in running:
                    os.kill(pid, signal.SIGKILL)
                    del kill_at[pid]
            while running:
                pid, status = os.waitpid(-1, os.WNOHANG)
                if pid == 0:
                    break
                conn = running.pop(pid, None)
                kill_at.pop(pid, None)
                if conn is not None:
                    code = os.waitstatus_to_exitcode(status)
                    try:
                        conn.sendall((json.dumps({"exit": code if code >= 0 else 128 - code}) + "\n").encode())
                    except OSError:
                        pass
                    try:
                        selector.unregister(conn)
                    except (KeyError, ValueError):
                        pass
                    conn.close()
                last_work = time.monotonic()
    finally:
        listener.close()
        path.unlink(missing_ok=True)  # ours: no other server binds it while we hold the lock
        lock.close()


if __name__ == "__main__":
    sys.exit(main())
