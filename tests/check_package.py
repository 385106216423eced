"""The Debian package builds, installs and passes the pg_regress suites (long mode).

Runs only when AFFINITY_TEST_LONG is set (scripts/test --long), since it
builds the whole extension again: about a minute here.

1. scripts/package builds postgresql-15-affinity (dpkg-buildpackage with
   debian/rules: debhelper and pg_buildext) from this checkout's files.
2. The package's control data: its name, the version of affinity.control
   and debian/changelog, and dependencies on PostgreSQL 15 and OpenBLAS;
   it holds the library and every file of the extension's DATA, and
   nothing outside PostgreSQL 15's directories and its own doc directory.
3. It is installed with dpkg into a private copy of the PostgreSQL 15 tree
   this run uses (`dpkg-deb -x` into the copy's root, the package's paths
   under /usr): the system tree is shared with other builds on a machine,
   and `dpkg -i` there would replace their library.  Every affinity file
   of the copy comes from the package (the copy's own are deleted first).
4. A cluster of the copy's binaries serves the installed files, and
   `make installcheck` (the pg_regress suites and the isolation specs) runs
   against it with the copy's pg_config: every test passes.
"""

import glob
import os
import re
import shutil
import subprocess
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import Checker, REPO_DIR, skip  # noqa: E402
import _clusters  # noqa: E402


def sh(cmd, **kw):
    return subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                          universal_newlines=True, **kw)


def private_tree(tmp):
    """A copy of this run's PostgreSQL 15 tree (bin, lib, share) under a new root, without
    affinity's files; returns (root, bin directory)."""
    bindir = _clusters.pg_bin()
    suffix = "/usr/lib/postgresql/15/bin"
    if not bindir.endswith(suffix):
        skip("the PostgreSQL binaries at %s are not laid out as Debian's (.../usr/lib/postgresql/15/bin)"
             % bindir)
    old_root = bindir[:-len(suffix)]
    root = os.path.join(tmp, "pgroot")
    shutil.rmtree(root, ignore_errors=True)
    for sub in ("usr/lib/postgresql/15", "usr/share/postgresql/15"):
        shutil.copytree(os.path.join(old_root or "/", sub), os.path.join(root, sub), symlinks=True)
    for f in (glob.glob(os.path.join(root, "usr/lib/postgresql/15/lib/affinity.so")) +
              glob.glob(os.path.join(root, "usr/share/postgresql/15/extension/affinity*"))):
        os.unlink(f)
    os.chmod(tmp, 0o755)
    return root, os.path.join(root, suffix.lstrip("/"))


def main():
    if not os.environ.get("AFFINITY_TEST_LONG"):
        skip("long test: set AFFINITY_TEST_LONG=1 (scripts/test --long) to build and install the package")
    for tool in ("dpkg-buildpackage", "dh", "pg_buildext"):
        if not shutil.which(tool):
            skip("%s is not installed (apt-get install debhelper postgresql-common dpkg-dev; "
                 "scripts/package installs them as root)" % tool)
    c = Checker("check_package")
    tmp = os.environ.get("AFFINITY_TEST_TMP") or "/tmp"
    out = os.path.join(tmp, "deb")

    # 1. build
    p = sh([os.path.join(REPO_DIR, "scripts", "package"), out])
    debs = glob.glob(os.path.join(out, "postgresql-15-affinity_*.deb"))
    if not c.check(p.returncode == 0 and len(debs) == 1, "scripts/package builds postgresql-15-affinity",
                   p.stdout.strip().splitlines()[-1] if p.stdout.strip() else "no output"):
        print(p.stdout[-4000:])
        c.finish()
    deb = debs[0]

    # 2. control data and contents
    field = lambda name: sh(["dpkg-deb", "-f", deb, name]).stdout.strip()  # noqa: E731
    with open(os.path.join(REPO_DIR, "affinity.control")) as f:
        extversion = re.search(r"default_version\s*=\s*'([^']+)'", f.read()).group(1)
    with open(os.path.join(REPO_DIR, "debian", "changelog")) as f:
        changelog_version = re.match(r"\S+ \(([^)]+)\)", f.readline()).group(1)
    depends = field("Depends")
    c.check(field("Package") == "postgresql-15-affinity" and field("Version") == changelog_version
            and changelog_version.startswith(extversion + "."),
            "the package is postgresql-15-affinity %s, extension version %s" % (changelog_version, extversion))
    c.check(re.search(r"\bpostgresql-15\b", depends) is not None and "libopenblas" in depends,
            "it depends on PostgreSQL 15 and OpenBLAS", depends)
    listing = sh(["dpkg-deb", "-c", deb]).stdout
    files = sorted(line.split()[-1].lstrip(".") for line in listing.splitlines()
                   if not line.startswith("d"))
    with open(os.path.join(REPO_DIR, "Makefile")) as f:
        data = re.search(r"^DATA\s*=\s*(.*)$", f.read(), re.M).group(1).split()
    wanted = (["/usr/lib/postgresql/15/lib/affinity.so", "/usr/share/postgresql/15/extension/affinity.control"]
              + ["/usr/share/postgresql/15/extension/" + os.path.basename(d) for d in data])
    c.check(all(w in files for w in wanted), "it holds the library, the control file and every DATA script",
            "missing: %s" % [w for w in wanted if w not in files])
    strays = [f for f in files if not f.startswith(("/usr/lib/postgresql/15/", "/usr/share/postgresql/15/",
                                                    "/usr/share/doc/postgresql-15-affinity/"))]
    c.check(not strays, "nothing outside PostgreSQL 15's directories and its doc directory", "%s" % strays)

    # 3. install into a private tree
    root, bindir = private_tree(tmp)
    p = sh(["dpkg-deb", "-x", deb, root])
    c.check(p.returncode == 0, "dpkg-deb -x installs the package into the private tree", p.stdout.strip())
    installed = [w for w in wanted if os.path.exists(root + w)]
    c.check(installed == wanted, "every file of the extension in the private tree comes from the package",
            "%d of %d" % (len(installed), len(wanted)))
    pg_config = os.path.join(bindir, "pg_config")
    c.check(sh([pg_config, "--pkglibdir"]).stdout.strip() == os.path.join(root, "usr/lib/postgresql/15/lib"),
            "the private tree's pg_config points at the installed library")

    # 4. pg_regress against the installed files
    if os.geteuid() == 0:
        sh(["chown", "-R", "postgres:", root])
    os.environ["AFFINITY_PG_BIN"] = bindir
    cl = _clusters.Cluster("package").initdb()
    cl.start()
    env = dict(os.environ, PGHOST=cl.sock, PGPORT=str(cl.port), PGUSER="postgres",
               PATH=bindir + ":" + os.environ.get("PATH", ""))
    env.pop("PGDATABASE", None)
    work = os.path.join(tmp, "regress")
    shutil.rmtree(work, ignore_errors=True)
    # installcheck in a copy of the test files, so that the checkout gets no results/ of it
    os.makedirs(work)
    for d in ("sql", "expected", "specs"):
        shutil.copytree(os.path.join(REPO_DIR, d), os.path.join(work, d))
    shutil.copy(os.path.join(REPO_DIR, "Makefile"), work)
    os.chmod(work, 0o777)
    p = sh(["make", "-C", work, "installcheck", "PG_CONFIG=" + pg_config], env=env)
    ok_lines = re.findall(r"^(?:test |     )\S+\s+\.\.\. ok", p.stdout, re.M)
    failed = re.findall(r"^(?:test |     )(\S+)\s+\.\.\. FAILED", p.stdout, re.M)
    summary = [line for line in p.stdout.splitlines() if "tests passed" in line or "failed" in line]
    if not c.check(p.returncode == 0 and not failed and len(ok_lines) >= 10,
                   "make installcheck against the installed package passes",
                   "%d ok, failed %s; %s" % (len(ok_lines), failed, "; ".join(summary))):
        print(p.stdout[-6000:])
        for diffs in glob.glob(os.path.join(work, "**", "regression.diffs"), recursive=True):
            with open(diffs) as f:
                print(f.read()[:6000])
    cl.remove()
    c.finish()


if __name__ == "__main__":
    try:
        main()
    except RuntimeError as exc:
        print("FAILED: %s" % exc)
        sys.exit(1)
