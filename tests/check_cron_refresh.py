"""A scheduled refresh through pg_cron, as an operator sets up a nightly refit.

Two named models of the demo shop are scheduled with cron.schedule every
minute (pg_cron's finest granularity in the version Debian 12 ships):

* the nightly picks, whose run must succeed: cron.job_run_details records a
  succeeded run, the model's version goes up by one, its fitted_at lies
  within the run, and the history holds the new version;
* a model of net quantities (purchases less returns) whose data hold a
  return larger than the purchase, so its query yields a negative weight:
  the run must be recorded as failed with affinity's message, and the
  current model, its version and its history must stay as they were.

A third model belongs to a role that logs in and may only define models
(the registry runs a model's query only in sessions logged in as its owner):

* a job that a superuser schedules for that role (cron.schedule_in_database
  with username => the owner) refreshes it: pg_cron's session logs in as the
  owner, so the run succeeds and the version goes up by one;
* a job of the superuser's own (cron.schedule) that refreshes the same model
  is refused: the run is recorded as failed with affinity's
  insufficient-privilege message naming the owner, and it changes nothing.

The jobs are removed as soon as each has run once (and again on the way
out).  pg_cron runs jobs only in the database named by cron.database_name;
scripts/test preloads it with that set to the tests' database.  The test
skips, saying why, when pg_cron is not installed or not set up for this
database.
"""

import time

import psycopg2

from _common import Checker, connect, drop_schema, skip

SCHEMA = "cron_shop"
GOOD = "cron_shop_nightly"
BAD = "cron_shop_net"
OWNED = "cron_shop_owned"
OWNER_ROLE = "regress_cron_owner"
# job key -> (model, job name, the role the job runs as; None = the scheduler)
JOBS = {GOOD: (GOOD, "affinity_refresh_" + GOOD, None),
        BAD: (BAD, "affinity_refresh_" + BAD, None),
        "owner": (OWNED, "affinity_refresh_" + OWNED, OWNER_ROLE),
        "superuser": (OWNED, "affinity_refresh_" + OWNED + "_by_superuser", None)}
JOB_NAMES = [job for _, job, _ in JOBS.values()]
WAIT_SECONDS = 130


def one(cur, sql, args=None):
    cur.execute(sql, args)
    row = cur.fetchone()
    return row[0] if row else None


def check_pg_cron(cur):
    """Skip unless pg_cron can run jobs in this database."""
    if not one(cur, "SELECT count(*) FROM pg_available_extensions WHERE name = 'pg_cron'"):
        skip("pg_cron is not installed (Debian package postgresql-15-cron)")
    libs = one(cur, "SELECT current_setting('shared_preload_libraries')")
    if "pg_cron" not in [x.strip() for x in libs.split(",")]:
        skip("pg_cron is installed but not preloaded (shared_preload_libraries = '%s')" % libs)
    db = one(cur, "SELECT current_setting('cron.database_name', true)")
    here = one(cur, "SELECT current_database()")
    if db != here:
        skip("pg_cron runs jobs in database %r (cron.database_name), not in %r" % (db, here))


def unschedule_ours(cur):
    cur.execute("SELECT jobid FROM cron.job WHERE jobname = ANY(%s)", (JOB_NAMES,))
    for (jobid,) in cur.fetchall():
        cur.execute("SELECT cron.unschedule(%s)", (jobid,))


def drop_owner_role(cur):
    cur.execute("SELECT count(*) FROM pg_roles WHERE rolname = %s", (OWNER_ROLE,))
    if cur.fetchone()[0]:
        cur.execute("REVOKE ALL ON affinity.models, affinity.model_history FROM %s" % OWNER_ROLE)
        cur.execute("DROP OWNED BY %s" % OWNER_ROLE)
        cur.execute("DROP ROLE %s" % OWNER_ROLE)


def setup_owned(cur):
    """A role that logs in and may only define models defines and fits OWNED
    in a session of its own."""
    cur.execute("CREATE ROLE %s LOGIN" % OWNER_ROLE)
    cur.execute("GRANT USAGE ON SCHEMA %s TO %s" % (SCHEMA, OWNER_ROLE))
    cur.execute("GRANT SELECT ON %s.purchases TO %s" % (SCHEMA, OWNER_ROLE))
    cur.execute("GRANT SELECT, INSERT, UPDATE ON affinity.models TO %s" % OWNER_ROLE)
    cur.execute("GRANT SELECT, INSERT, DELETE ON affinity.model_history TO %s" % OWNER_ROLE)
    own = psycopg2.connect(user=OWNER_ROLE)
    own.autocommit = True
    with own.cursor() as ocur:
        ocur.execute("""SELECT affinity.define_model(%%s,
                          'SELECT customer_id AS user_id, product_id AS item_id, quantity AS weight
                           FROM %s.purchases', '{"factors": 8, "iterations": 4, "threads": 1}')""" % SCHEMA,
                     (OWNED,))
        ocur.execute("SELECT affinity.refresh(%s)", (OWNED,))
    own.close()


def setup(cur):
    drop_schema(cur, SCHEMA)
    cur.execute("DELETE FROM affinity.models WHERE name = ANY(%s)", ([GOOD, BAD, OWNED],))
    drop_owner_role(cur)
    cur.execute("CREATE SCHEMA %s" % SCHEMA)
    cur.execute("""CREATE TABLE %s.purchases AS
                   SELECT (50001 + c)::bigint AS customer_id,
                          (101 + (c %% 5) * 8 + abs(hashint4(c * 31 + k)) %% 8)::bigint AS product_id,
                          (1 + abs(hashint4(c * 17 + k)) %% 2)::real AS quantity
                   FROM generate_series(0, 149) c, generate_series(1, 5) k""" % SCHEMA)
    cur.execute("""CREATE TABLE %s.returns (customer_id bigint, product_id bigint,
                                            quantity real)""" % SCHEMA)
    opts = '{"factors": 8, "iterations": 4, "threads": 1}'
    cur.execute("""SELECT affinity.define_model(%%s,
                     'SELECT customer_id AS user_id, product_id AS item_id, quantity AS weight
                      FROM %s.purchases', %%s)""" % SCHEMA, (GOOD, opts))
    cur.execute("""SELECT affinity.define_model(%%s,
                     'SELECT customer_id AS user_id, product_id AS item_id,
                             sum(p.quantity) - coalesce(max(r.quantity), 0) AS weight
                      FROM %s.purchases p LEFT JOIN %s.returns r USING (customer_id, product_id)
                      GROUP BY customer_id, product_id', %%s)""" % (SCHEMA, SCHEMA), (BAD, opts))
    for name in (GOOD, BAD):
        cur.execute("SELECT affinity.refresh(%s)", (name,))
    setup_owned(cur)
    # a return of five for a purchase of one or two: a negative net quantity
    cur.execute("""INSERT INTO %s.returns
                   SELECT customer_id, product_id, 5 FROM %s.purchases
                   ORDER BY customer_id, product_id LIMIT 1
                   RETURNING customer_id, product_id""" % (SCHEMA, SCHEMA))
    return cur.fetchone()


def state(cur, name):
    cur.execute("""SELECT version, affinity.describe(model)->>'checksum', fitted_at,
                          (SELECT count(*) FROM affinity.model_history h WHERE h.name = m.name)
                   FROM affinity.models m WHERE name = %s""", (name,))
    return cur.fetchone()


def wait_for_runs(cur, jobids):
    """Poll cron.job_run_details until every job has a finished run; returns
    {jobid: (status, return_message, start_time, end_time)} and the seconds waited."""
    t0 = time.monotonic()
    done = {}
    while time.monotonic() - t0 < WAIT_SECONDS:
        cur.execute("""SELECT DISTINCT ON (jobid) jobid, status, return_message, start_time, end_time
                       FROM cron.job_run_details
                       WHERE jobid = ANY(%s) AND status IN ('succeeded', 'failed')
                       ORDER BY jobid, runid""", (list(jobids),))
        for jobid, status, msg, start, end in cur.fetchall():
            if jobid not in done:
                done[jobid] = (status, msg, start, end)
        if len(done) == len(jobids):
            break
        time.sleep(1)
    return done, time.monotonic() - t0


def report_jobs(cur, jobids):
    print("---- cron.job ----")
    cur.execute("SELECT jobid, jobname, schedule, command, database, username, active "
                "FROM cron.job WHERE jobid = ANY(%s)", (list(jobids),))
    for row in cur.fetchall():
        print("  %r" % (row,))
    print("---- cron.job_run_details ----")
    cur.execute("SELECT jobid, runid, status, return_message, start_time, end_time "
                "FROM cron.job_run_details WHERE jobid = ANY(%s) ORDER BY runid", (list(jobids),))
    rows = cur.fetchall()
    for row in rows:
        print("  %r" % (row,))
    if not rows:
        print("  (no run recorded)")
    cur.execute("SELECT pid, backend_type, state, wait_event FROM pg_stat_activity "
                "WHERE backend_type LIKE '%%cron%%'")
    print("---- pg_cron processes: %r" % (cur.fetchall(),))


def main():
    c = Checker("check_cron_refresh")
    conn = connect()
    cur = conn.cursor()
    check_pg_cron(cur)
    created = not one(cur, "SELECT count(*) FROM pg_extension WHERE extname = 'pg_cron'")
    cur.execute("CREATE EXTENSION IF NOT EXISTS pg_cron")
    jobids = {}
    try:
        unschedule_ours(cur)
        bad_user, bad_item = setup(cur)
        good_before = state(cur, GOOD)
        bad_before = state(cur, BAD)
        owned_before = state(cur, OWNED)

        for key, (name, job, user) in JOBS.items():
            if user is None:
                jobids[key] = one(cur, "SELECT cron.schedule(%s, '* * * * *', "
                                       "format('SELECT affinity.refresh(%%L)', %s::text))", (job, name))
            else:
                jobids[key] = one(cur, "SELECT cron.schedule_in_database(%s, '* * * * *', "
                                       "format('SELECT affinity.refresh(%%L)', %s::text), "
                                       "current_database(), username => %s)", (job, name, user))
        scheduled_at = one(cur, "SELECT clock_timestamp()")
        print("scheduled jobs %s at %s; waiting for the next minute"
              % (sorted(jobids.values()), scheduled_at.strftime("%H:%M:%S")))
        runs, waited = wait_for_runs(cur, jobids.values())
        unschedule_ours(cur)            # one run each is all this test wants
        print("waited %.0f s for the runs" % waited)
        if len(runs) != len(jobids):
            report_jobs(cur, jobids.values())
            c.check(False, "all %d scheduled refreshes ran within %d s" % (len(jobids), WAIT_SECONDS),
                    "finished: %s" % sorted(runs))
            c.finish()

        # the good one
        status, msg, start, end = runs[jobids[GOOD]]
        c.check(status == "succeeded", "the scheduled refresh of %s succeeded" % GOOD,
                "status %s: %s" % (status, msg))
        after = state(cur, GOOD)
        c.check(after[0] == good_before[0] + 1, "its version went up by one",
                "%s -> %s" % (good_before[0], after[0]))
        # fitted_at is now() of the job's own transaction, which can begin a
        # few milliseconds before pg_cron stamps the run's start_time; the
        # refit must lie after the scheduling and before the run's end.
        c.check(after[2] is not None and scheduled_at <= after[2] <= end,
                "its fitted_at lies between the scheduling and the end of the recorded run",
                "fitted_at %s, scheduled %s, run %s .. %s" % (after[2], scheduled_at, start, end))
        c.check(one(cur, "SELECT count(*) FROM affinity.model_history WHERE name = %s AND version = %s",
                    (GOOD, after[0])) == 1,
                "the history holds version %s" % after[0])

        # the failing one
        status, msg, start, end = runs[jobids[BAD]]
        msg = msg or ""
        c.check(status == "failed", "the scheduled refresh of %s is recorded as failed" % BAD,
                "status %s" % status)
        want = 'refresh of model "%s" failed' % BAD
        c.check(want in msg and "negative" in msg,
                "job_run_details carries affinity's message",
                repr(msg.strip()))
        c.check("User %d, item %d" % (bad_user, bad_item) in msg,
                "and its detail names the offending customer and product (%d, %d)"
                % (bad_user, bad_item))
        bad_after = state(cur, BAD)
        c.check(bad_after == bad_before,
                "its current model, version and history stayed as they were",
                "before %r, after %r" % (bad_before[:2] + bad_before[3:], bad_after[:2] + bad_after[3:]))

        # the owner's model: refreshed by the owner's job, refused to the superuser's
        status, msg, start, end = runs[jobids["owner"]]
        c.check(status == "succeeded",
                "the refresh of %s scheduled to run as its owner %s succeeded" % (OWNED, OWNER_ROLE),
                "status %s: %s" % (status, msg))
        status, msg, start, end = runs[jobids["superuser"]]
        msg = msg or ""
        want = 'refresh of model "%s" must run in a session of its owner, %s' % (OWNED, OWNER_ROLE)
        c.check(status == "failed" and want in msg,
                "the superuser's own job refreshing %s is refused" % OWNED,
                "status %s: %r" % (status, msg.strip()))
        owned_after = state(cur, OWNED)
        c.check(owned_after[0] == owned_before[0] + 1,
                "its version went up by one (the owner's run alone)",
                "%s -> %s" % (owned_before[0], owned_after[0]))
        c.check(one(cur, "SELECT owner::text FROM affinity.models WHERE name = %s", (OWNED,)) == OWNER_ROLE,
                "and it still belongs to %s" % OWNER_ROLE)
        c.check(one(cur, "SELECT count(*) FROM cron.job WHERE jobname = ANY(%s)",
                    (JOB_NAMES,)) == 0, "every job is unscheduled")
    finally:
        try:
            unschedule_ours(cur)
            if jobids:
                cur.execute("DELETE FROM cron.job_run_details WHERE jobid = ANY(%s)",
                            (list(jobids.values()),))
            cur.execute("DELETE FROM affinity.models WHERE name = ANY(%s)", ([GOOD, BAD, OWNED],))
            drop_schema(cur, SCHEMA)
            drop_owner_role(cur)
            if created:
                cur.execute("DROP EXTENSION pg_cron")
        except psycopg2.Error as e:
            print("cleanup: %s" % e)
    c.finish()


if __name__ == "__main__":
    main()
