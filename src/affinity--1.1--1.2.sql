/* src/affinity--1.1--1.2.sql */

-- complain if script is sourced in psql, rather than via ALTER EXTENSION
\echo Use "ALTER EXTENSION affinity UPDATE TO '1.2'" to load this file. \quit

-- 1.2, in sections:
--   C functions bound to the library's 1.2 symbol names (affinity_*); this
--     section comes first because later ones call C functions.
--   The registry as a security boundary: a model's owner is a role oid
--     (with the name it had), a model's query is checked and run only in a
--     session logged in as its owner, and only the owner changes a model.
--   Aggregates that say what their final functions do (FINALFUNC_MODIFY).
-- Each section stands alone; later changes of 1.2 go in sections of their
-- own at the end.

-- C functions: the library's symbol names ---------------------------------

-- The 1.2 library exports only what PostgreSQL looks up, each SQL-callable
-- function under the name affinity_<its 1.1 symbol> (1.1 named most of them
-- without the prefix: top_items, score, describe, model_in, ...).  A
-- database created by an older library names the old symbols in pg_proc,
-- and until this update every call of such a function fails with "could not
-- find function".  Each C function of the extension whose symbol lacks the
-- prefix is defined again from its own catalog entry (pg_get_functiondef:
-- argument names and defaults, result, volatility, strictness, PARALLEL,
-- COST, ROWS, as this database has them) with only the symbol changed;
-- CREATE OR REPLACE keeps its oid, so its comment, privileges, extension
-- membership and the aggregates and types that use it stay as they are.
-- A database whose functions name the new symbols already (created by this
-- library) has nothing to change here.  A definition that does not end as
-- pg_get_functiondef writes it is refused rather than guessed at.
DO $$
DECLARE
	f record;
	def text;
	tail text;
BEGIN
	FOR f IN
		SELECT p.oid, p.prosrc
		FROM pg_catalog.pg_proc p
		JOIN pg_catalog.pg_depend d
			ON d.classid = 'pg_catalog.pg_proc'::pg_catalog.regclass AND d.objid = p.oid
			   AND d.deptype = 'e'
		JOIN pg_catalog.pg_extension e ON e.oid = d.refobjid AND e.extname = 'affinity'
		WHERE p.prolang = (SELECT l.oid FROM pg_catalog.pg_language l WHERE l.lanname = 'c')
		  AND p.probin = 'MODULE_PATHNAME'
		  AND p.prosrc NOT LIKE 'affinity\_%'
		ORDER BY p.oid
	LOOP
		def := pg_catalog.pg_get_functiondef(f.oid);
		tail := 'AS ''MODULE_PATHNAME'', $function$' || f.prosrc || '$function$' || E'\n';
		IF pg_catalog.right(def, pg_catalog.length(tail)) IS DISTINCT FROM tail THEN
			RAISE EXCEPTION 'cannot rebind function % to its 1.2 symbol', f.oid::pg_catalog.regprocedure
				USING DETAIL = pg_catalog.format('Its definition does not end with %L.', tail);
		END IF;
		EXECUTE pg_catalog.left(def, pg_catalog.length(def) - pg_catalog.length(tail))
			|| 'AS ''MODULE_PATHNAME'', ' || pg_catalog.quote_literal('affinity_' || f.prosrc);
	END LOOP;
END
$$;

-- The registry: owner as a role oid ----------------------------------------

-- The 1.1 trigger would rewrite the owner while the column changes type.
DROP TRIGGER models_set_owner ON affinity.models;
DROP FUNCTION affinity.models_set_owner();

-- The owner is kept as a role oid (regrole: shown and dumped by name) and
-- beside it the name the role had when it wrote the query.  A role that was
-- dropped before this update leaves oid 0 ("-"), and its model cannot be
-- refreshed until a superuser hands it to a role or deletes it.
ALTER TABLE affinity.models ALTER COLUMN owner DROP DEFAULT;
ALTER TABLE affinity.models ADD COLUMN owner_name name;
UPDATE affinity.models SET owner_name = owner;
ALTER TABLE affinity.models ALTER COLUMN owner TYPE regrole
	USING COALESCE(pg_catalog.to_regrole(pg_catalog.quote_ident(owner)), '-'::regrole);
ALTER TABLE affinity.models ALTER COLUMN owner_name SET NOT NULL;
COMMENT ON COLUMN affinity.models.owner IS 'the role that wrote the query: it is checked and run only in sessions logged in as this role';
COMMENT ON COLUMN affinity.models.owner_name IS 'the owner''s name when it wrote the query: a refresh is refused when the role is gone or its name differs';

-- Who the calling session is: the role it logged in as (the one that
-- authenticated, which SET SESSION AUTHORIZATION does not change; only a
-- superuser's login can switch session users), its session user and its
-- current user.  Resolved by oid; a missing role gives NULL.
CREATE FUNCTION affinity.registry_session(OUT login_role oid, OUT session_role oid,
		OUT acting_role oid, OUT acting_is_superuser boolean)
	LANGUAGE plpgsql STABLE
	SET search_path = pg_catalog, pg_temp
AS $$
BEGIN
	SELECT a.usesysid INTO login_role
		FROM pg_catalog.pg_stat_get_activity(pg_catalog.pg_backend_pid()) a;
	SELECT r.oid INTO session_role FROM pg_catalog.pg_roles r WHERE r.rolname = session_user;
	SELECT r.oid, r.rolsuper INTO acting_role, acting_is_superuser
		FROM pg_catalog.pg_roles r WHERE r.rolname = current_user;
END
$$;
COMMENT ON FUNCTION affinity.registry_session() IS 'the calling session''s login role, session user and current user, as oids (for the registry''s owner checks)';

-- Refuse unless the calling session is the model's owner and nobody else:
-- logged in as the owner, with the owner as session user and current user
-- (so neither SET ROLE, SET SESSION AUTHORIZATION, a SECURITY DEFINER
-- function nor membership in the owner passes), and the owner's oid still
-- carries the name it had when it wrote the query (so a dropped and
-- recreated role, or an oid restored into another cluster, inherits
-- nothing).  Superusers are not exempt: code in the query could otherwise
-- switch back to their rights.  action names the call in the message.
CREATE FUNCTION affinity.require_model_owner(model_name text, model_owner regrole,
		model_owner_name name, action text)
	RETURNS void
	LANGUAGE plpgsql STABLE
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	s record;
	owner_now name;
	login_name name;
	caller text;
BEGIN
	SELECT r.rolname INTO owner_now FROM pg_catalog.pg_roles r WHERE r.oid = model_owner::oid;
	IF owner_now IS NULL OR owner_now OPERATOR(pg_catalog.<>) model_owner_name THEN
		RAISE EXCEPTION '% of model "%" is refused: the role that wrote its query, %, %',
			action, model_name, model_owner_name,
			CASE WHEN owner_now IS NULL THEN 'no longer exists' ELSE 'is now named ' || owner_now END
			USING ERRCODE = 'insufficient_privilege',
				  DETAIL = CASE WHEN owner_now IS NULL
						   THEN pg_catalog.format('The query was written by role %s, which has been dropped; a role created later, even of the same name, does not inherit it.',
												  model_owner_name)
						   ELSE pg_catalog.format('The query was written by role %s; the role with that oid is now named %s, and a query runs only for the role that wrote it.',
												  model_owner_name, owner_now) END,
				  HINT = 'A superuser can hand the model to a role after reading its query (UPDATE affinity.models SET owner = ''role'' WHERE name = ...), or delete it.';
	END IF;
	s := affinity.registry_session();
	IF s.login_role IS DISTINCT FROM model_owner::oid
	   OR s.session_role IS DISTINCT FROM model_owner::oid
	   OR s.acting_role IS DISTINCT FROM model_owner::oid THEN
		SELECT r.rolname INTO login_name FROM pg_catalog.pg_roles r WHERE r.oid = s.login_role;
		caller := CASE WHEN login_name = session_user AND session_user = current_user
					   THEN pg_catalog.format('role %s', current_user)
					   ELSE pg_catalog.format('role %s (session user %s, logged in as %s)',
											  current_user, session_user, coalesce(login_name, 'an unknown role')) END;
		RAISE EXCEPTION '% of model "%" must run in a session of its owner, %', action, model_name, owner_now
			USING ERRCODE = 'insufficient_privilege',
				  DETAIL = pg_catalog.format('Model "%s" is owned by role %s; the caller is %s.',
											 model_name, owner_now, caller),
				  HINT = CASE WHEN action = 'refresh'
						 THEN pg_catalog.format('Connect as %1$s, or schedule the refresh as %1$s: cron.schedule run by %1$s, or, by a superuser, cron.schedule_in_database(''refresh-%2$s'', ''30 2 * * *'', %3$L, current_database(), username => %4$L).',
												owner_now, model_name,
												pg_catalog.format('SELECT affinity.refresh(%L)', model_name), owner_now)
						 ELSE pg_catalog.format('Connect as %s: a model''s query is checked and run only in sessions logged in as its owner.', owner_now) END;
	END IF;
END
$$;
COMMENT ON FUNCTION affinity.require_model_owner(text, regrole, name, text) IS 'raise insufficient_privilege unless the session is logged in as the model''s owner and runs as it';

-- Only the owner writes a model's row: its query, options, search path,
-- history size, owner, and the model and version that refresh and revert
-- write.  Owner means the oid and the name both match the current user.
-- A superuser may write any row, as PostgreSQL always allows, but a
-- superuser who writes a query or its search path becomes its owner, so no
-- other role's query ever runs in a superuser's session; a superuser may also
-- hand a model to a role (owner, owner_name) or insert rows with their owner
-- (pg_restore does).  Anyone else who inserts a row owns it.
CREATE FUNCTION affinity.models_guard()
	RETURNS trigger
	LANGUAGE plpgsql
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	s record;
	owner_now name;
BEGIN
	s := affinity.registry_session();
	IF TG_OP = 'INSERT' THEN
		IF NOT (coalesce(s.acting_is_superuser, false) AND NEW.owner IS NOT NULL) THEN
			NEW.owner := s.acting_role::regrole;
			NEW.owner_name := current_user;
		ELSIF NEW.owner_name IS NULL THEN
			SELECT r.rolname INTO NEW.owner_name FROM pg_catalog.pg_roles r WHERE r.oid = NEW.owner::oid;
		END IF;
		RETURN NEW;
	END IF;
	IF NOT coalesce(s.acting_is_superuser, false)
	   AND NOT (OLD.owner::oid IS NOT DISTINCT FROM s.acting_role AND OLD.owner_name = current_user) THEN
		SELECT r.rolname INTO owner_now FROM pg_catalog.pg_roles r WHERE r.oid = OLD.owner::oid;
		RAISE EXCEPTION 'only the owner of model "%" may %', OLD.name,
			CASE TG_OP WHEN 'DELETE' THEN 'delete it' ELSE 'change it' END
			USING ERRCODE = 'insufficient_privilege',
				  DETAIL = pg_catalog.format('Model "%s" is owned by %s; the caller is role %s.',
											 OLD.name,
											 CASE WHEN owner_now IS NOT DISTINCT FROM OLD.owner_name
												  THEN 'role ' || OLD.owner_name
												  ELSE pg_catalog.format('role %s, which has since been dropped or renamed (only a superuser may change the model now)',
																		 OLD.owner_name) END,
											 current_user),
				  HINT = 'Its owner (logged in as itself) or a superuser may change it; define a model of your own under another name.';
	END IF;
	IF TG_OP = 'DELETE' THEN
		RETURN OLD;
	END IF;
	IF NEW.source_query IS DISTINCT FROM OLD.source_query
	   OR NEW.search_path IS DISTINCT FROM OLD.search_path
	   OR NOT coalesce(s.acting_is_superuser, false) THEN
		NEW.owner := s.acting_role::regrole;
		NEW.owner_name := current_user;
	ELSIF NEW.owner IS DISTINCT FROM OLD.owner AND NEW.owner_name IS NOT DISTINCT FROM OLD.owner_name THEN
		-- a superuser hands the model to another role: the name follows
		SELECT r.rolname INTO NEW.owner_name FROM pg_catalog.pg_roles r WHERE r.oid = NEW.owner::oid;
	END IF;
	RETURN NEW;
END
$$;
CREATE TRIGGER models_guard BEFORE INSERT OR UPDATE OR DELETE ON affinity.models
	FOR EACH ROW EXECUTE FUNCTION affinity.models_guard();

-- The history belongs to the model's owner too: revert_model makes a kept
-- version current, so a row planted there is a model served later.  The
-- cascades of the foreign key run as the table's owner (a superuser).
CREATE FUNCTION affinity.model_history_guard()
	RETURNS trigger
	LANGUAGE plpgsql
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	s record;
	names text[];
	n text;
	m record;
BEGIN
	s := affinity.registry_session();
	IF NOT coalesce(s.acting_is_superuser, false) THEN
		IF TG_OP = 'INSERT' THEN
			names := ARRAY[NEW.name];
		ELSIF TG_OP = 'DELETE' THEN
			names := ARRAY[OLD.name];
		ELSE
			names := ARRAY[OLD.name, NEW.name];
		END IF;
		FOREACH n IN ARRAY names
		LOOP
			SELECT x.owner, x.owner_name INTO m FROM affinity.models x WHERE x.name = n;
			IF NOT FOUND OR NOT (m.owner::oid IS NOT DISTINCT FROM s.acting_role
								 AND m.owner_name = current_user) THEN
				RAISE EXCEPTION 'only the owner of model "%" may change its history', n
					USING ERRCODE = 'insufficient_privilege',
						  DETAIL = pg_catalog.format('Model "%s" is owned by %s; the caller is role %s.',
													 n, coalesce('role ' || m.owner_name, 'no role (there is no such model)'),
													 current_user);
			END IF;
		END LOOP;
	END IF;
	RETURN CASE TG_OP WHEN 'DELETE' THEN OLD ELSE NEW END;
END
$$;
CREATE TRIGGER model_history_guard BEFORE INSERT OR UPDATE OR DELETE ON affinity.model_history
	FOR EACH ROW EXECUTE FUNCTION affinity.model_history_guard();

-- TRUNCATE skips row triggers: only a superuser may empty the registry.
CREATE FUNCTION affinity.registry_truncate_guard()
	RETURNS trigger
	LANGUAGE plpgsql
	SET search_path = pg_catalog, pg_temp
AS $$
BEGIN
	IF NOT coalesce((affinity.registry_session()).acting_is_superuser, false) THEN
		RAISE EXCEPTION 'only a superuser may truncate %', TG_TABLE_SCHEMA || '.' || TG_TABLE_NAME
			USING ERRCODE = 'insufficient_privilege',
				  HINT = 'Owners delete their own models with DELETE FROM affinity.models WHERE name = ...';
	END IF;
	RETURN NULL;
END
$$;
CREATE TRIGGER models_truncate_guard BEFORE TRUNCATE ON affinity.models
	FOR EACH STATEMENT EXECUTE FUNCTION affinity.registry_truncate_guard();
CREATE TRIGGER model_history_truncate_guard BEFORE TRUNCATE ON affinity.model_history
	FOR EACH STATEMENT EXECUTE FUNCTION affinity.registry_truncate_guard();

-- define_model, refresh and revert_model are written once, in the section
-- "The registry: key types from the query" below: a model's query is checked
-- and run only in a session logged in as its owner (require_model_owner),
-- with no role switch at all, and only the owner redefines or reverts it.

-- Aggregates: what the final functions do ----------------------------------

-- fit's final function frees the collected rows and keeps its result, and
-- ranking_metrics' sorts the held-out pairs: PostgreSQL must not feed more
-- rows after finalizing (window use), and fit's state must not be shared.
-- PostgreSQL 15 cannot ALTER an aggregate's FINALFUNC_MODIFY, so the
-- aggregates are made again with the same definition; nothing in the
-- extension depends on them (refresh builds its call at run time), and a
-- view of the user's that calls one makes this update fail with PostgreSQL's
-- list of dependent objects (drop the view, update, create it again).
DROP AGGREGATE affinity.fit(bigint, bigint, real);
DROP AGGREGATE affinity.fit(bigint, bigint, real, jsonb);
DROP AGGREGATE affinity.fit(text, text, real);
DROP AGGREGATE affinity.fit(text, text, real, jsonb);
DROP AGGREGATE affinity.ranking_metrics(affinity.model, bigint, bigint, integer);
DROP AGGREGATE affinity.ranking_metrics(affinity.model, bigint, bigint);

CREATE AGGREGATE affinity.fit(user_id bigint, item_id bigint, weight real) (
	SFUNC = affinity.fit_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id bigint, item_id bigint, weight real, options jsonb) (
	SFUNC = affinity.fit_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id text, item_id text, weight real) (
	SFUNC = affinity.fit_text_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id text, item_id text, weight real, options jsonb) (
	SFUNC = affinity.fit_text_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id bigint, item_id bigint, k integer) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	FINALFUNC_MODIFY = SHAREABLE,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id bigint, item_id bigint) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	FINALFUNC_MODIFY = SHAREABLE,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit(bigint, bigint, real) IS 'fit a model over (user, item, weight) rows with default options';
COMMENT ON AGGREGATE affinity.fit(bigint, bigint, real, jsonb) IS 'fit a model over (user, item, weight) rows; options as jsonb';
COMMENT ON AGGREGATE affinity.fit(text, text, real) IS 'fit a model over (user, item, weight) rows with text keys';
COMMENT ON AGGREGATE affinity.fit(text, text, real, jsonb) IS 'fit a model over (user, item, weight) rows with text keys; options as jsonb';
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, bigint, bigint) IS 'ranking metrics at k = 10 over held-out (user, item) rows';
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, bigint, bigint, integer) IS 'precision, recall, NDCG, MAP, hit rate and coverage at k over held-out (user, item) rows';

-- The registry: key types from the query -----------------------------------

-- A model's key types come from its query's own columns, are checked when it
-- is defined, stored with it ("user type,item type") and kept: a refresh
-- whose query now yields other types is refused and the current model stays.
-- NULL (a row inserted without define_model) means "not known yet": the
-- first refresh takes them from the query.  The CHECK lists every pair a
-- model value can describe; which of them a fit accepts is
-- affinity.registry_key_type_pairs().
ALTER TABLE affinity.models ADD COLUMN key_types text
	CONSTRAINT models_key_types_check
	CHECK (key_types IN ('bigint,bigint', 'text,text', 'bigint,text', 'text,bigint'));
COMMENT ON COLUMN affinity.models.key_types IS 'the key types of user_id and item_id as the query yields them (''bigint,bigint'' or ''text,text''); a refresh keeps them';

-- The pairs of key types a fit takes: the one place to change when fit
-- gains an overload (mixed pairs: add 'bigint,text', 'text,bigint').
CREATE FUNCTION affinity.registry_key_type_pairs()
	RETURNS text[]
	LANGUAGE sql IMMUTABLE PARALLEL SAFE
	SET search_path = pg_catalog, pg_temp
	RETURN ARRAY['bigint,bigint', 'text,text'];
COMMENT ON FUNCTION affinity.registry_key_type_pairs() IS 'the (user, item) key type pairs a registry model may have';

-- The key types of a model value, in the registry's form.
CREATE FUNCTION affinity.model_key_types(m affinity.model)
	RETURNS text
	LANGUAGE sql STABLE PARALLEL SAFE STRICT
	SET search_path = pg_catalog, pg_temp
	RETURN CASE affinity.describe(m) OPERATOR(pg_catalog.->>) 'key_type'
		   WHEN 'text' THEN 'text,text' WHEN 'bigint' THEN 'bigint,bigint' END;
COMMENT ON FUNCTION affinity.model_key_types(affinity.model) IS 'a model''s user and item key types as ''user type,item type''';

-- The types of the query's user_id and item_id columns, without reading a
-- row: the query, limited to no row, is the inner side of a left join with
-- one row, whose NULLs carry the columns' types to pg_typeof.  It runs with
-- its own search_path; weight must cast to real.  The caller is the model's
-- owner in its own session (define_model, refresh); the tables the query
-- reads stay locked against type changes until the transaction ends.
CREATE FUNCTION affinity.registry_query_types(source_query text, query_search_path text,
		OUT user_type regtype, OUT item_type regtype)
	LANGUAGE plpgsql VOLATILE
	SET search_path = pg_catalog, pg_temp
AS $$
BEGIN
	PERFORM pg_catalog.set_config('search_path', query_search_path, true);
	EXECUTE pg_catalog.format(
		'SELECT pg_catalog.pg_typeof(q.user_id)::pg_catalog.regtype, pg_catalog.pg_typeof(q.item_id)::pg_catalog.regtype '
		'FROM (VALUES (1)) AS one (x) LEFT JOIN '
		'(SELECT user_id, item_id, weight::real AS weight FROM (%s) AS q0 LIMIT 0) AS q ON true',
		source_query)
		INTO user_type, item_type;
	PERFORM pg_catalog.set_config('search_path', 'pg_catalog, pg_temp', true);
END
$$;
COMMENT ON FUNCTION affinity.registry_query_types(text, text) IS 'the types of a source query''s user_id and item_id columns, without reading a row';

-- The registry's key type of one column type (a type name, as regtype
-- prints it here): smallint, integer and bigint are bigint keys, text and
-- varchar text keys (domains by their base type); any other type is refused
-- with the cast to write in the query.
CREATE FUNCTION affinity.registry_key_type(model_name text, column_name text, column_type text)
	RETURNS text
	LANGUAGE plpgsql STABLE
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	t oid := pg_catalog.to_regtype(column_type)::oid;
	base oid;
BEGIN
	LOOP
		SELECT y.typbasetype INTO base FROM pg_catalog.pg_type y
			WHERE y.oid = t AND y.typtype = 'd';
		EXIT WHEN base IS NULL;
		t := base;
	END LOOP;
	IF t IN ('int2'::regtype, 'int4'::regtype, 'int8'::regtype) THEN
		RETURN 'bigint';
	ELSIF t IN ('text'::regtype, 'varchar'::regtype) THEN
		RETURN 'text';
	ELSIF t IN ('numeric'::regtype, 'float4'::regtype, 'float8'::regtype) THEN
		RAISE EXCEPTION 'the source query of model "%" yields % of type %, which cannot be a key',
			model_name, column_name, column_type
			USING ERRCODE = 'datatype_mismatch',
				  DETAIL = 'Keys are bigint (smallint and integer count as bigint) or text; a fractional id would be rounded or written with its decimals.',
				  HINT = pg_catalog.format('Cast it in the query: %1$s::bigint AS %1$s when every id is a whole number (17850.0 becomes 17850), or %1$s::text AS %1$s to keep each id as written.',
										   column_name);
	ELSE
		RAISE EXCEPTION 'the source query of model "%" yields % of type %, which cannot be a key',
			model_name, column_name, column_type
			USING ERRCODE = 'datatype_mismatch',
				  DETAIL = 'Keys are bigint (smallint and integer count as bigint) or text (varchar counts as text).',
				  HINT = pg_catalog.format('Cast it in the query: %1$s::text AS %1$s (or %1$s::bigint AS %1$s for whole numbers).',
										   column_name);
	END IF;
END
$$;
COMMENT ON FUNCTION affinity.registry_key_type(text, text, text) IS 'bigint or text: the key type of a source query''s column type, or an error naming the cast';

-- The key types of a query's columns as a pair a fit takes, or an error.
CREATE FUNCTION affinity.registry_key_types(model_name text, user_type text, item_type text)
	RETURNS text
	LANGUAGE plpgsql STABLE
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	u text := affinity.registry_key_type(model_name, 'user_id', user_type);
	i text := affinity.registry_key_type(model_name, 'item_id', item_type);
BEGIN
	IF NOT (u || ',' || i) OPERATOR(pg_catalog.=) ANY (affinity.registry_key_type_pairs()) THEN
		RAISE EXCEPTION 'the source query of model "%" yields % user ids and % item ids', model_name, u, i
			USING ERRCODE = 'feature_not_supported',
				  DETAIL = pg_catalog.format('A model''s user and item keys have one type in this version: %s.',
											 pg_catalog.array_to_string(affinity.registry_key_type_pairs(), ' or ')),
				  HINT = CASE WHEN u = 'bigint'
						 THEN 'Cast the users to text in the query (user_id::text AS user_id) and serve with text keys.'
						 ELSE 'Cast the items to text in the query (item_id::text AS item_id) and serve with text keys.' END;
	END IF;
	RETURN u || ',' || i;
END
$$;
COMMENT ON FUNCTION affinity.registry_key_types(text, text, text) IS 'the ''user type,item type'' pair of a source query''s key columns, or an error naming the casts';

-- 1.1 rows keep the key types of their current model; 1.1 refreshes built
-- bigint keys, so a model never fitted gets bigint keys.  A stored value
-- that cannot be read leaves NULL (the next refresh takes the query's).
ALTER TABLE affinity.models DISABLE TRIGGER models_guard;
DO $$
DECLARE
	r record;
BEGIN
	FOR r IN SELECT m.name, m.model FROM affinity.models m LOOP
		BEGIN
			UPDATE affinity.models m
				SET key_types = coalesce(affinity.model_key_types(r.model), 'bigint,bigint')
				WHERE m.name = r.name;
		EXCEPTION WHEN OTHERS THEN
			NULL;
		END;
	END LOOP;
END
$$;
ALTER TABLE affinity.models ENABLE TRIGGER models_guard;

-- define_model: the caller must be logged in as itself (the query is checked
-- here, so it runs only in its future owner's session) and may redefine only
-- a model it owns; keep_versions (NULL: 3 for a new model, unchanged for a
-- redefined one); the query's key types are stored.
DROP FUNCTION affinity.define_model(text, text, jsonb, text);
CREATE FUNCTION affinity.define_model(name text, source_query text, options jsonb DEFAULT '{}',
		query_search_path text DEFAULT pg_catalog.current_setting('search_path'),
		keep_versions integer DEFAULT NULL)
	RETURNS void
	LANGUAGE plpgsql VOLATILE
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	s record;
	r affinity.models;
	t record;
	kt text;
	kept integer;
BEGIN
	IF name IS NULL OR source_query IS NULL OR options IS NULL OR query_search_path IS NULL THEN
		RAISE EXCEPTION 'name, source_query, options and query_search_path must not be NULL'
			USING ERRCODE = 'null_value_not_allowed';
	END IF;
	IF pg_catalog.jsonb_typeof(options) OPERATOR(pg_catalog.<>) 'object' THEN
		RAISE EXCEPTION 'options must be a jsonb object'
			USING ERRCODE = 'invalid_parameter_value',
				  DETAIL = pg_catalog.format('The options given are %s.', options);
	END IF;
	IF keep_versions < 1 THEN
		RAISE EXCEPTION 'keep_versions must be at least 1'
			USING ERRCODE = 'invalid_parameter_value',
				  DETAIL = pg_catalog.format('keep_versions is %s.', keep_versions),
				  HINT = 'The history keeps this many models of the name for revert_model; the current model is always kept.';
	END IF;
	SELECT * INTO r FROM affinity.models m WHERE m.name = define_model.name;
	IF FOUND THEN
		PERFORM affinity.require_model_owner(r.name, r.owner, r.owner_name, 'redefinition');
	ELSE
		s := affinity.registry_session();
		IF s.login_role IS DISTINCT FROM s.acting_role OR s.session_role IS DISTINCT FROM s.acting_role THEN
			RAISE EXCEPTION 'define_model must run in a session logged in as the role that will own model "%"', name
				USING ERRCODE = 'insufficient_privilege',
					  DETAIL = pg_catalog.format('The current user is %s, the session user %s, the login role %s.',
												 current_user, session_user,
												 coalesce((SELECT x.rolname FROM pg_catalog.pg_roles x WHERE x.oid = s.login_role),
														  'unknown')),
					  HINT = pg_catalog.format('Connect as %s: a model''s query is checked and run only in sessions logged in as its owner.', current_user);
		END IF;
	END IF;
	-- the query must yield user_id, item_id and weight; the keys' types are
	-- the ones it yields (planned and started, no row read)
	BEGIN
		t := affinity.registry_query_types(source_query, query_search_path);
	EXCEPTION WHEN OTHERS THEN
		RAISE EXCEPTION 'the source query of model "%" cannot feed a fit', name
			USING ERRCODE = 'invalid_parameter_value',
				  DETAIL = SQLERRM,
				  HINT = 'The query must yield columns user_id and item_id (bigint or text) and weight (castable to real).';
	END;
	kt := affinity.registry_key_types(name, t.user_type::text, t.item_type::text);
	IF r.model IS NOT NULL AND r.key_types IS DISTINCT FROM kt THEN
		RAISE NOTICE 'model "%" takes % keys from its next refresh; its current model has % keys',
			name, kt, coalesce(r.key_types, affinity.model_key_types(r.model))
			USING HINT = 'Serving calls and held-out tables must pass keys of the new types after the next refresh.';
	END IF;
	INSERT INTO affinity.models AS m (name, source_query, options, search_path, key_types, keep_versions)
	VALUES (define_model.name, define_model.source_query, define_model.options,
			define_model.query_search_path, kt, coalesce(define_model.keep_versions, 3))
	ON CONFLICT ON CONSTRAINT models_pkey DO UPDATE
		SET source_query = EXCLUDED.source_query, options = EXCLUDED.options,
			search_path = EXCLUDED.search_path, key_types = EXCLUDED.key_types,
			keep_versions = coalesce(define_model.keep_versions, m.keep_versions)
	RETURNING m.keep_versions INTO kept;
	-- a smaller history is trimmed now, as the next refresh would
	IF define_model.keep_versions IS NOT NULL THEN
		DELETE FROM affinity.model_history h
			WHERE h.name = define_model.name
			  AND h.version <= (SELECT greatest(max(x.version), max(m.version))
								FROM affinity.model_history x, affinity.models m
								WHERE x.name = define_model.name AND m.name = define_model.name) - kept;
	END IF;
END
$$;
COMMENT ON FUNCTION affinity.define_model(text, text, jsonb, text, integer) IS 'register or redefine a named model: its query (checked in the owner''s session), options, search_path and history size, with the key types its query yields';

-- refresh: the query runs only in a session logged in as the model's owner,
-- with no role switch at all (a query that switches role is refused); its
-- key types are checked against the stored ones before the fit, and the fit
-- is called for exactly those types.
CREATE OR REPLACE FUNCTION affinity.refresh(name text)
	RETURNS jsonb
	LANGUAGE plpgsql VOLATILE
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	r affinity.models;
	s record;
	t record;
	kt text;
	fit_call text;
	fitted affinity.model;
	started timestamptz := clock_timestamp();
	d jsonb;
	result jsonb;
	new_version integer;
	msg text;
	detail text;
BEGIN
	-- the owner check comes before the row lock, which needs UPDATE rights
	SELECT * INTO r FROM affinity.models m WHERE m.name = refresh.name;
	IF NOT FOUND THEN
		RAISE EXCEPTION 'no model named "%"', name
			USING ERRCODE = 'undefined_object',
				  HINT = 'Register it first with affinity.define_model(name, source_query, options).';
	END IF;
	PERFORM affinity.require_model_owner(r.name, r.owner, r.owner_name, 'refresh');
	-- one refresh of a name at a time: a second one waits for the first;
	-- the row may have changed meanwhile, so it is checked again
	SELECT * INTO r FROM affinity.models m WHERE m.name = refresh.name FOR UPDATE;
	IF NOT FOUND THEN
		RAISE EXCEPTION 'no model named "%"', name USING ERRCODE = 'undefined_object';
	END IF;
	PERFORM affinity.require_model_owner(r.name, r.owner, r.owner_name, 'refresh');
	-- the key types the query yields now (the tables it reads stay locked
	-- against type changes until the end of the transaction)
	BEGIN
		t := affinity.registry_query_types(r.source_query, r.search_path);
	EXCEPTION WHEN OTHERS THEN
		GET STACKED DIAGNOSTICS msg = MESSAGE_TEXT;
		RAISE EXCEPTION 'refresh of model "%" failed: %', name, msg
			USING ERRCODE = SQLSTATE, HINT = 'The current model stays in place.';
	END;
	kt := affinity.registry_key_types(r.name, t.user_type::text, t.item_type::text);
	IF r.key_types IS NOT NULL AND kt OPERATOR(pg_catalog.<>) r.key_types THEN
		RAISE EXCEPTION 'refresh of model "%" is refused: its source query now yields % keys, the model has % keys',
			name, kt, r.key_types
			USING ERRCODE = 'datatype_mismatch',
				  DETAIL = pg_catalog.format('user_id is %s and item_id is %s; the model was defined with keys %s, which its serving calls and held-out tables use.',
											 t.user_type, t.item_type, r.key_types),
				  HINT = 'The current model stays in place. Cast the columns back in the query, or redefine the model with define_model to change its key types.';
	END IF;
	-- kt is one of the pairs checked above: only these two type names enter the call
	fit_call := pg_catalog.format('SELECT affinity.fit(user_id::%s, item_id::%s, weight::real, $1) FROM (%s) AS q',
								  CASE pg_catalog.split_part(kt, ',', 1) WHEN 'text' THEN 'text' ELSE 'bigint' END,
								  CASE pg_catalog.split_part(kt, ',', 2) WHEN 'text' THEN 'text' ELSE 'bigint' END,
								  r.source_query);
	PERFORM set_config('search_path', r.search_path, true);
	BEGIN
		EXECUTE fit_call INTO fitted USING r.options;
		s := affinity.registry_session();
		IF s.session_role IS DISTINCT FROM r.owner::oid OR s.acting_role IS DISTINCT FROM r.owner::oid THEN
			RAISE EXCEPTION 'the source query switched to role %', current_user
				USING ERRCODE = 'insufficient_privilege',
					  DETAIL = pg_catalog.format('A refresh runs as the model''s owner %s from start to end.', r.owner_name);
		END IF;
		PERFORM set_config('search_path', 'pg_catalog, pg_temp', true);
	EXCEPTION WHEN OTHERS THEN
		GET STACKED DIAGNOSTICS msg = MESSAGE_TEXT, detail = PG_EXCEPTION_DETAIL;
		IF coalesce(detail, '') = '' THEN
			RAISE EXCEPTION 'refresh of model "%" failed: %', name, msg
				USING ERRCODE = SQLSTATE, HINT = 'The current model stays in place.';
		END IF;
		RAISE EXCEPTION 'refresh of model "%" failed: %', name, msg
			USING ERRCODE = SQLSTATE, DETAIL = detail,
				  HINT = 'The current model stays in place.';
	END;
	-- after a revert the current version is not the newest one kept
	SELECT greatest(r.version, coalesce(max(h.version), 0)) + 1 INTO new_version
		FROM affinity.model_history h WHERE h.name = refresh.name;
	d := affinity.describe(fitted);
	result := jsonb_build_object(
		'name', name, 'version', new_version, 'method', d->'method', 'key_types', kt,
		'rows', d->'rows_read', 'users', d->'users', 'items', d->'items',
		'interactions', d->'interactions', 'fit_seconds', d->'fit_seconds',
		'seconds', extract(epoch FROM clock_timestamp() - started),
		'final_loss', d->'loss'->-1, 'size_bytes', d->'size_bytes');
	UPDATE affinity.models m
		SET model = fitted, version = new_version, fitted_at = now(), stats = result, key_types = kt
		WHERE m.name = refresh.name;
	INSERT INTO affinity.model_history (name, version, model, fitted_at, stats)
		VALUES (name, new_version, fitted, now(), result);
	DELETE FROM affinity.model_history h
		WHERE h.name = refresh.name AND h.version <= new_version - r.keep_versions;
	RETURN result;
END
$$;

-- revert_model: the owner's, in its own session, like refresh; a kept
-- version of other key types (from before a redefinition) is not brought back.
CREATE OR REPLACE FUNCTION affinity.revert_model(name text, to_version integer DEFAULT NULL)
	RETURNS jsonb
	LANGUAGE plpgsql VOLATILE
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	r affinity.models;
	h affinity.model_history;
	hk text;
BEGIN
	SELECT * INTO r FROM affinity.models m WHERE m.name = revert_model.name;
	IF NOT FOUND THEN
		RAISE EXCEPTION 'no model named "%"', name USING ERRCODE = 'undefined_object';
	END IF;
	PERFORM affinity.require_model_owner(r.name, r.owner, r.owner_name, 'revert');
	SELECT * INTO r FROM affinity.models m WHERE m.name = revert_model.name FOR UPDATE;
	IF NOT FOUND THEN
		RAISE EXCEPTION 'no model named "%"', name USING ERRCODE = 'undefined_object';
	END IF;
	PERFORM affinity.require_model_owner(r.name, r.owner, r.owner_name, 'revert');
	SELECT * INTO h FROM affinity.model_history x
		WHERE x.name = revert_model.name
		  AND x.version = coalesce(to_version,
								   (SELECT max(y.version) FROM affinity.model_history y
									WHERE y.name = revert_model.name AND y.version < r.version));
	IF NOT FOUND THEN
		RAISE EXCEPTION 'model "%" has no version % in its history', name,
			coalesce(to_version::text, 'before ' || r.version)
			USING ERRCODE = 'undefined_object',
				  HINT = 'Kept versions are listed in affinity.model_history.';
	END IF;
	hk := affinity.model_key_types(h.model);
	IF r.key_types IS NOT NULL AND hk IS DISTINCT FROM r.key_types THEN
		RAISE EXCEPTION 'version % of model "%" has % keys, the model has % keys', h.version, name, hk, r.key_types
			USING ERRCODE = 'datatype_mismatch',
				  DETAIL = 'The version was fitted before the model was redefined with other key types.',
				  HINT = 'The current model stays in place; revert to a version fitted since the redefinition.';
	END IF;
	UPDATE affinity.models m
		SET model = h.model, version = h.version, fitted_at = h.fitted_at, stats = h.stats
		WHERE m.name = revert_model.name;
	RETURN jsonb_build_object('name', name, 'version', h.version, 'fitted_at', h.fitted_at);
END
$$;

-- ranking_metrics over text keys -------------------------------------------

-- The same transition function reads its key types from its arguments.
CREATE FUNCTION affinity.ranking_metrics_transfn(internal, affinity.model, text, text, integer)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.ranking_metrics_transfn(internal, affinity.model, text, text)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_transfn' LANGUAGE C PARALLEL SAFE;
CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id text, item_id text, k integer) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	FINALFUNC_MODIFY = SHAREABLE,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id text, item_id text) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	FINALFUNC_MODIFY = SHAREABLE,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, text, text) IS 'ranking metrics at k = 10 over held-out (user, item) rows with text keys';
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, text, text, integer) IS 'precision, recall, NDCG, MAP, hit rate and coverage at k over held-out (user, item) rows with text keys';
