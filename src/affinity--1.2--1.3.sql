/* src/affinity--1.2--1.3.sql */

-- complain if script is sourced in psql, rather than via ALTER EXTENSION
\echo Use "ALTER EXTENSION affinity UPDATE TO '1.3'" to load this file. \quit

-- 1.3, in sections:
--   Mixed keys: bigint users with text items and text users with bigint
--     items, in the fit, the serving functions and the registry.
--   Serving: where each row came from, the batch's filters and fallback,
--     one order of the leading arguments.
--   Evaluation: held-out statements that do not copy a model per row.
--   Beyond one server: the registry's writers refused on a hot standby
--     with a hint to run them on the primary.
-- Each section stands alone; later changes of 1.3 go in sections of their
-- own at the end.

-- Mixed keys --------------------------------------------------------------

-- Serving -----------------------------------------------------------------

-- Evaluation --------------------------------------------------------------

-- Beyond one server -------------------------------------------------------

-- A hot standby serves the registry's models (get_model and the serving
-- functions only read), but the functions that write the registry cannot
-- run there, and PostgreSQL's own error names a statement inside their
-- bodies ("cannot execute SELECT FOR UPDATE in a read-only transaction").
-- Every writer of the registry (define_model, refresh, revert_model, the
-- guard triggers) asks registry_session() who is calling before it writes,
-- so that is where a server in recovery is refused, with the same SQLSTATE
-- (read_only_sql_transaction, 25006) and a hint naming where to run them.
CREATE OR REPLACE FUNCTION affinity.registry_session(OUT login_role oid, OUT session_role oid,
		OUT acting_role oid, OUT acting_is_superuser boolean)
	LANGUAGE plpgsql STABLE
	SET search_path = pg_catalog, pg_temp
AS $$
BEGIN
	IF pg_catalog.pg_is_in_recovery() THEN
		RAISE EXCEPTION 'the model registry cannot be changed on a hot standby'
			USING ERRCODE = 'read_only_sql_transaction',
				  DETAIL = 'This server is in recovery: affinity.models and affinity.model_history are read-only here and change only by replication from the primary.',
				  HINT = 'Run affinity.define_model, affinity.refresh and affinity.revert_model on the primary server; the standby serves the new model once it has replayed the change.';
	END IF;
	SELECT a.usesysid INTO login_role
		FROM pg_catalog.pg_stat_get_activity(pg_catalog.pg_backend_pid()) a;
	SELECT r.oid INTO session_role FROM pg_catalog.pg_roles r WHERE r.rolname = session_user;
	SELECT r.oid, r.rolsuper INTO acting_role, acting_is_superuser
		FROM pg_catalog.pg_roles r WHERE r.rolname = current_user;
END
$$;
COMMENT ON FUNCTION affinity.registry_session() IS 'the calling session''s login role, session user and current user, as oids (for the registry''s owner checks); refuses on a hot standby, where the registry is read-only';
