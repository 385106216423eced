"""More PostgreSQL clusters for one tests/ program (a module, not a test).

scripts/test gives each program one cluster (PGHOST, PGPORT).  A program that
needs servers of its own (a primary and a hot standby, shards and a
coordinator) starts them here: each cluster gets a private directory with its
data and its socket directory, a port of its own and no TCP listener, runs as
the `postgres` user when the program runs as root (initdb, pg_ctl and postgres
refuse root), and is stopped and removed when the program exits, also when it
fails, raises or is stopped by SIGTERM (scripts/test's timeout).

Ports: the ten ports from $AFFINITY_TEST_EXTRA_PORT, by default ten above
$AFFINITY_TEST_PORT (or PGPORT, or 54329); a port that answers on TCP is passed
over (the clusters themselves listen on their private socket directories only).  The binaries are those of $AFFINITY_PG_BIN, else the
first pg_ctl in PATH (scripts/test puts PostgreSQL 15's bin first), so the
extension installed by scripts/test is the one the new clusters load.
"""

import atexit
import os
import pwd
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time

import psycopg2

_LIVE = []          # clusters started and not yet removed, stopped at exit


def pg_bin():
    d = os.environ.get("AFFINITY_PG_BIN")
    if d and os.path.exists(os.path.join(d, "pg_ctl")):
        return d
    found = shutil.which("pg_ctl")
    if not found:
        raise RuntimeError("no pg_ctl: set AFFINITY_PG_BIN to PostgreSQL 15's bin directory")
    return os.path.dirname(found)


def _is_root():
    return os.geteuid() == 0


def _as_pg(cmd):
    """cmd as the cluster's owner: postgres under root, else ourselves."""
    return ["runuser", "-u", "postgres", "--"] + cmd if _is_root() else cmd


def run_pg(cmd, check=True, timeout=300):
    """Run a PostgreSQL program as the cluster owner; its output on failure."""
    p = subprocess.run(_as_pg(cmd), stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                       universal_newlines=True, timeout=timeout)
    if check and p.returncode != 0:
        raise RuntimeError("%s failed (exit %d):\n%s" % (" ".join(cmd), p.returncode, p.stdout))
    return p


def _port_busy(port):
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.settimeout(0.2)
        return s.connect_ex(("127.0.0.1", port)) == 0


def _port_range():
    first = os.environ.get("AFFINITY_TEST_EXTRA_PORT")
    if first:
        first = int(first)
    else:
        first = int(os.environ.get("AFFINITY_TEST_PORT") or os.environ.get("PGPORT") or 54329) + 10
    return list(range(first, first + 10))


_TAKEN = set()


def _next_port():
    for port in _port_range():
        if port not in _TAKEN and not _port_busy(port):
            _TAKEN.add(port)
            return port
    raise RuntimeError("no free port in %d-%d for another cluster"
                       % (_port_range()[0], _port_range()[-1]))


def _base_dir(name):
    """A private directory for one cluster, short enough for a socket path."""
    parent = os.environ.get("AFFINITY_TEST_TMP") or tempfile.gettempdir()
    if len(parent) > 60:
        parent = "/tmp"
    d = tempfile.mkdtemp(prefix="affc-%s-" % name, dir=parent)
    os.chmod(d, 0o755)
    return d


def _chown_pg(path):
    if _is_root():
        pw = pwd.getpwnam("postgres")
        for root, dirs, files in os.walk(path):
            os.chown(root, pw.pw_uid, pw.pw_gid)
            for f in files:
                os.chown(os.path.join(root, f), pw.pw_uid, pw.pw_gid)


class Cluster:
    """One private cluster: .name, .port, .sock (socket directory), .data."""

    def __init__(self, name):
        self.name = name
        self.base = _base_dir(name)
        self.data = os.path.join(self.base, "data")
        self.sock = os.path.join(self.base, "sock")
        self.log = os.path.join(self.base, "server.log")
        os.mkdir(self.sock)
        self.port = _next_port()
        self.running = False
        _LIVE.append(self)

    # -- making the data directory

    def initdb(self, settings=()):
        """A new cluster (trust authentication, UTF8), with extra postgresql.conf lines."""
        os.mkdir(self.data, 0o700)
        _chown_pg(self.base)
        run_pg([os.path.join(pg_bin(), "initdb"), "-D", self.data, "--auth=trust",
                "-U", "postgres", "--no-locale", "--encoding=UTF8"])
        # throwaway data: durability buys nothing here.  synchronous_commit stays on, so
        # that a commit is in the WAL that pg_current_wal_lsn() reports when it returns
        # (wait_replay's target); with it off, the commit record may still be unwritten.
        self.configure(["fsync = off", "full_page_writes = off"] + list(settings))
        return self

    def basebackup_of(self, primary, settings=()):
        """A hot standby of primary: pg_basebackup -R (streaming replication, WAL streamed
        during the copy, primary_conninfo and standby.signal written)."""
        _chown_pg(self.base)
        run_pg([os.path.join(pg_bin(), "pg_basebackup"), "-D", self.data, "-R",
                "-X", "stream", "-c", "fast", "-h", primary.sock, "-p", str(primary.port),
                "-U", "postgres"])
        os.chmod(self.data, 0o700)
        self.configure(list(settings))
        return self

    def configure(self, lines):
        """Append settings to postgresql.conf (later lines win)."""
        if not lines:
            return
        conf = os.path.join(self.data, "postgresql.conf")
        text = "".join(line + "\n" for line in lines)
        p = subprocess.run(_as_pg(["tee", "-a", conf]), input=text, stdout=subprocess.DEVNULL,
                           universal_newlines=True)
        if p.returncode != 0:
            raise RuntimeError("cannot write %s" % conf)

    # -- running it

    def start(self):
        # the log lives beside data/ so that a base backup does not copy it
        run_pg([os.path.join(pg_bin(), "pg_ctl"), "-D", self.data, "-l", self.log, "-w",
                "-t", "120", "-o", "-p %d -k %s -c listen_addresses=''" % (self.port, self.sock),
                "start"])
        self.running = True
        return self

    def stop(self, mode="fast"):
        if self.running:
            p = run_pg([os.path.join(pg_bin(), "pg_ctl"), "-D", self.data, "-m", mode, "-w",
                        "-t", "60", "stop"], check=False)
            if p.returncode != 0 and mode != "immediate":
                run_pg([os.path.join(pg_bin(), "pg_ctl"), "-D", self.data, "-m", "immediate",
                        "-w", "-t", "60", "stop"], check=False)
            self.running = False

    def remove(self):
        self.stop()
        shutil.rmtree(self.base, ignore_errors=True)
        if self in _LIVE:
            _LIVE.remove(self)

    def log_tail(self, n=30):
        try:
            with open(self.log, errors="replace") as f:
                return "".join(f.readlines()[-n:])
        except OSError:
            return "(no log)"

    # -- connecting

    def dsn(self, dbname="postgres"):
        return "host=%s port=%d user=postgres dbname=%s" % (self.sock, self.port, dbname)

    def connect(self, dbname="postgres", autocommit=True):
        conn = psycopg2.connect(self.dsn(dbname))
        conn.autocommit = autocommit
        return conn

    def wait_ready(self, dbname="postgres", seconds=60):
        """Connect until the server accepts connections (a standby after its start)."""
        t_end = time.monotonic() + seconds
        while True:
            try:
                return self.connect(dbname)
            except psycopg2.OperationalError:
                if time.monotonic() > t_end:
                    raise
                time.sleep(0.2)


def wait_replay(primary_conn, standby_conn, seconds=60):
    """Wait until the standby has replayed all WAL the primary has written so far
    (pg_last_wal_replay_lsn() >= the primary's pg_current_wal_lsn(), which covers every
    transaction committed on the primary with synchronous_commit on); returns the
    seconds waited, raises RuntimeError after `seconds`."""
    with primary_conn.cursor() as cur:
        cur.execute("SELECT pg_current_wal_lsn()")
        target = cur.fetchone()[0]
    t0 = time.monotonic()
    with standby_conn.cursor() as cur:
        while True:
            cur.execute("SELECT pg_last_wal_replay_lsn() >= %s::pg_lsn, pg_last_wal_replay_lsn()",
                        (target,))
            done, at = cur.fetchone()
            if done:
                return time.monotonic() - t0
            if time.monotonic() - t0 > seconds:
                raise RuntimeError("the standby replayed up to %s, not %s, in %d s"
                                   % (at, target, seconds))
            time.sleep(0.05)


def remove_all():
    """Stop and remove every cluster still alive (run at exit)."""
    for c in list(reversed(_LIVE)):
        try:
            c.remove()
        except Exception as exc:  # cleaning up: report and go on with the others
            print("could not remove cluster %s: %s" % (c.name, exc), file=sys.stderr)


def _on_term(signum, _frame):
    # SystemExit runs the atexit handlers, which stop the servers
    sys.exit(128 + signum)


atexit.register(remove_all)
for _sig in (signal.SIGTERM, signal.SIGHUP, signal.SIGINT):
    signal.signal(_sig, _on_term)
