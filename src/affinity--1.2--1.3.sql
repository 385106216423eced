/* src/affinity--1.2--1.3.sql */

-- complain if script is sourced in psql, rather than via ALTER EXTENSION
\echo Use "ALTER EXTENSION affinity UPDATE TO '1.3'" to load this file. \quit

-- 1.3, in sections:
--   Mixed keys: bigint users with text items and text users with bigint
--     items, in the fit, the serving functions and the registry.
--   Serving: where each row came from, the batch's filters and fallback,
--     one order of the leading arguments, rules (group caps, diversity).
--   Evaluation: held-out statements that do not copy a model per row.
--   Item profiles: the item x feature matrix of a catalogue as a model
--     value (feature rows or dense vectors), served by items_like.
--   Beyond one server: the registry's writers refused on a hot standby
--     with a hint to run them on the primary.
--   Content-based filtering: fit with item profiles (method content).
--   Feature reasons: the item features behind a content score.
--   Sequences: ordered events into sequential rules (fit_sequences),
--     served by next_items, next_items_for_all and items_like.
-- Each section stands alone; later changes of 1.3 go in sections of their
-- own at the end.

-- Mixed keys --------------------------------------------------------------

-- A model records each side's key type: bigint users with text items
-- ('bigint,text') or text users with bigint items ('text,bigint') besides
-- one type on both sides.  One transition function serves both mixed
-- pairs: it reads which side is text from its argument types.
CREATE FUNCTION affinity.fit_mixed_transfn(internal, bigint, text, real)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_mixed_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_mixed_transfn(internal, bigint, text, real, jsonb)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_mixed_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_mixed_transfn(internal, text, bigint, real)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_mixed_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_mixed_transfn(internal, text, bigint, real, jsonb)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_mixed_transfn' LANGUAGE C PARALLEL SAFE;

CREATE AGGREGATE affinity.fit(user_id bigint, item_id text, weight real) (
	SFUNC = affinity.fit_mixed_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id bigint, item_id text, weight real, options jsonb) (
	SFUNC = affinity.fit_mixed_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id text, item_id bigint, weight real) (
	SFUNC = affinity.fit_mixed_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id text, item_id bigint, weight real, options jsonb) (
	SFUNC = affinity.fit_mixed_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit(bigint, text, real) IS 'fit a model over (user, item, weight) rows with bigint user keys and text item keys';
COMMENT ON AGGREGATE affinity.fit(bigint, text, real, jsonb) IS 'fit a model over (user, item, weight) rows with bigint user keys and text item keys; options as jsonb';
COMMENT ON AGGREGATE affinity.fit(text, bigint, real) IS 'fit a model over (user, item, weight) rows with text user keys and bigint item keys';
COMMENT ON AGGREGATE affinity.fit(text, bigint, real, jsonb) IS 'fit a model over (user, item, weight) rows with text user keys and bigint item keys; options as jsonb';

-- Serving: the functions whose result the argument types alone decide get
-- the mixed pairs.  The others serve a mixed model through the existing
-- overloads (a bigint side in bigint calls, every side in the text forms).
CREATE FUNCTION affinity.score(model affinity.model, user_id bigint, item_id text)
	RETURNS real
	AS 'MODULE_PATHNAME', 'affinity_score' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.score(model affinity.model, user_id text, item_id bigint)
	RETURNS real
	AS 'MODULE_PATHNAME', 'affinity_score' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
COMMENT ON FUNCTION affinity.score(affinity.model, bigint, text) IS 'the model''s score for one user and item, NULL when either is unknown';
COMMENT ON FUNCTION affinity.score(affinity.model, text, bigint) IS 'the model''s score for one user and item, NULL when either is unknown';
CREATE FUNCTION affinity.reasons(model affinity.model, user_id bigint, item_id text, k integer DEFAULT 5)
	RETURNS TABLE (past_item_id text, contribution real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_reasons' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 5;
CREATE FUNCTION affinity.reasons(model affinity.model, user_id text, item_id bigint, k integer DEFAULT 5)
	RETURNS TABLE (past_item_id bigint, contribution real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_reasons' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 5;
COMMENT ON FUNCTION affinity.reasons(affinity.model, bigint, text, integer) IS 'the user''s training items that push the item''s score up, with their contributions';
COMMENT ON FUNCTION affinity.reasons(affinity.model, text, bigint, integer) IS 'the user''s training items that push the item''s score up, with their contributions';

CREATE FUNCTION affinity.ranking_metrics_transfn(internal, affinity.model, bigint, text, integer)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.ranking_metrics_transfn(internal, affinity.model, bigint, text)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.ranking_metrics_transfn(internal, affinity.model, text, bigint, integer)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.ranking_metrics_transfn(internal, affinity.model, text, bigint)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_transfn' LANGUAGE C PARALLEL SAFE;
CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id bigint, item_id text, k integer) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	FINALFUNC_MODIFY = SHAREABLE,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id bigint, item_id text) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	FINALFUNC_MODIFY = SHAREABLE,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id text, item_id bigint, k integer) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	FINALFUNC_MODIFY = SHAREABLE,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id text, item_id bigint) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	FINALFUNC_MODIFY = SHAREABLE,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, bigint, text) IS 'ranking metrics at k = 10 over held-out (user, item) rows with bigint user keys and text item keys';
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, bigint, text, integer) IS 'precision, recall, NDCG, MAP, hit rate and coverage at k over held-out (user, item) rows with bigint user keys and text item keys';
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, text, bigint) IS 'ranking metrics at k = 10 over held-out (user, item) rows with text user keys and bigint item keys';
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, text, bigint, integer) IS 'precision, recall, NDCG, MAP, hit rate and coverage at k over held-out (user, item) rows with text user keys and bigint item keys';

-- The registry takes the mixed pairs; describe()'s key_type names them
-- as the registry does.
CREATE OR REPLACE FUNCTION affinity.registry_key_type_pairs()
	RETURNS text[]
	LANGUAGE sql IMMUTABLE PARALLEL SAFE
	SET search_path = pg_catalog, pg_temp
	RETURN ARRAY['bigint,bigint', 'text,text', 'bigint,text', 'text,bigint'];
CREATE OR REPLACE FUNCTION affinity.model_key_types(m affinity.model)
	RETURNS text
	LANGUAGE sql STABLE PARALLEL SAFE STRICT
	SET search_path = pg_catalog, pg_temp
	RETURN CASE affinity.describe(m) OPERATOR(pg_catalog.->>) 'key_type'
		   WHEN 'text' THEN 'text,text' WHEN 'bigint' THEN 'bigint,bigint'
		   WHEN 'bigint,text' THEN 'bigint,text' WHEN 'text,bigint' THEN 'text,bigint' END;
COMMENT ON COLUMN affinity.models.key_types IS 'the key types of user_id and item_id as the query yields them (''bigint,bigint'', ''text,text'', ''bigint,text'' or ''text,bigint''); a refresh keeps them';

-- Serving -----------------------------------------------------------------

-- top_items and top_items_for_all gain a result column, source, saying
-- where each row came from: 'personal' (the user's own scores), 'basket'
-- (scores from the basket given), 'popular' (the model's popularity: an
-- unknown user or a basket of unknown items falling back, or a popularity
-- model).  The batch gains exclude, candidates and fallback_popular, as
-- top_items has, and serves unknown users as top_items does; the basket form
-- takes its arguments in the user form's order (model, key, k, exclude_seen,
-- exclude, candidates, fallback_popular), with weights last.  All of them
-- take rules last: at most N items per group and a diversity re-ranking.  A result type
-- cannot change in place, so each is dropped and made again; its grants
-- are carried over (a database that revoked EXECUTE from PUBLIC keeps it
-- revoked).  A view of the database's own that uses one of these functions
-- makes the update fail (DROP is refused): drop the view, update, create it
-- again.

CREATE FUNCTION affinity.replace_function_1_3(old_signature text, definition text,
		new_signature text, comment text)
	RETURNS void
	LANGUAGE plpgsql
	SET search_path = pg_catalog, pg_temp
	AS $fn$
DECLARE
	old_acl aclitem[];
	g record;
BEGIN
	SELECT proacl INTO old_acl FROM pg_proc WHERE oid = old_signature::regprocedure;
	EXECUTE 'DROP FUNCTION ' || old_signature;
	EXECUTE definition;
	EXECUTE format('COMMENT ON FUNCTION %s IS %L', new_signature, comment);
	IF old_acl IS NULL THEN
		RETURN;				-- the default: EXECUTE for PUBLIC, as a new function has
	END IF;
	EXECUTE format('REVOKE ALL ON FUNCTION %s FROM PUBLIC', new_signature);
	FOR g IN SELECT a.grantee, a.is_grantable FROM aclexplode(old_acl) a
			 WHERE a.privilege_type = 'EXECUTE'
	LOOP
		EXECUTE format('GRANT EXECUTE ON FUNCTION %s TO %s%s', new_signature,
					   CASE WHEN g.grantee = 0 THEN 'PUBLIC'
							ELSE quote_ident((SELECT rolname FROM pg_roles WHERE oid = g.grantee)) END,
					   CASE WHEN g.is_grantable THEN ' WITH GRANT OPTION' ELSE '' END);
	END LOOP;
	-- Grants made by an extension script are recorded as the function's
	-- initial privileges, which pg_dump leaves out of a dump; a fresh
	-- install records none.  Removing the record makes the carried grants
	-- the database's own again, so a dump restores them.
	DELETE FROM pg_init_privs
	WHERE objoid = new_signature::regprocedure AND classoid = 'pg_proc'::regclass AND objsubid = 0;
END
$fn$;

SELECT affinity.replace_function_1_3(
	'affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean)',
	$def$CREATE FUNCTION affinity.top_items(model affinity.model, user_id bigint, k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, exclude bigint[] DEFAULT NULL,
		candidates bigint[] DEFAULT NULL, fallback_popular boolean DEFAULT true,
		rules jsonb DEFAULT NULL)
	RETURNS TABLE (item_id bigint, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10$def$,
	'affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean, jsonb)',
	'the k best items for a user; source says whether a row is personal or a popular fallback');
SELECT affinity.replace_function_1_3(
	'affinity.top_items(affinity.model, text, integer, boolean, text[], text[], boolean)',
	$def$CREATE FUNCTION affinity.top_items(model affinity.model, user_id text, k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, exclude text[] DEFAULT NULL,
		candidates text[] DEFAULT NULL, fallback_popular boolean DEFAULT true,
		rules jsonb DEFAULT NULL)
	RETURNS TABLE (item_id text, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10$def$,
	'affinity.top_items(affinity.model, text, integer, boolean, text[], text[], boolean, jsonb)',
	'the k best items for a user (text keys); source says whether a row is personal or a popular fallback');
SELECT affinity.replace_function_1_3(
	'affinity.top_items(affinity.model, bigint[], integer, real[], boolean, bigint[], bigint[])',
	$def$CREATE FUNCTION affinity.top_items(model affinity.model, basket bigint[], k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, exclude bigint[] DEFAULT NULL,
		candidates bigint[] DEFAULT NULL, fallback_popular boolean DEFAULT true,
		weights real[] DEFAULT NULL, rules jsonb DEFAULT NULL)
	RETURNS TABLE (item_id bigint, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_basket' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10$def$,
	'affinity.top_items(affinity.model, bigint[], integer, boolean, bigint[], bigint[], boolean, real[], jsonb)',
	'the k best items for a basket of items (a user the model has not seen)');
SELECT affinity.replace_function_1_3(
	'affinity.top_items(affinity.model, text[], integer, real[], boolean, text[], text[])',
	$def$CREATE FUNCTION affinity.top_items(model affinity.model, basket text[], k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, exclude text[] DEFAULT NULL,
		candidates text[] DEFAULT NULL, fallback_popular boolean DEFAULT true,
		weights real[] DEFAULT NULL, rules jsonb DEFAULT NULL)
	RETURNS TABLE (item_id text, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_basket' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10$def$,
	'affinity.top_items(affinity.model, text[], integer, boolean, text[], text[], boolean, real[], jsonb)',
	'the k best items for a basket of items with text keys (a user the model has not seen)');
SELECT affinity.replace_function_1_3(
	'affinity.top_items_for_all(affinity.model, integer, boolean, bigint[])',
	$def$CREATE FUNCTION affinity.top_items_for_all(model affinity.model, k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, users bigint[] DEFAULT NULL,
		exclude bigint[] DEFAULT NULL, candidates bigint[] DEFAULT NULL,
		fallback_popular boolean DEFAULT true, rules jsonb DEFAULT NULL)
	RETURNS TABLE (user_id bigint, item_id bigint, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 100000$def$,
	'affinity.top_items_for_all(affinity.model, integer, boolean, bigint[], bigint[], bigint[], boolean, jsonb)',
	'the k best items for every user of the model (or the given users), in blocks');
-- the 1.1 positional text form, kept for the calls written for it
SELECT affinity.replace_function_1_3(
	'affinity.top_items_for_all(affinity.model, integer, boolean, text[])',
	$def$CREATE FUNCTION affinity.top_items_for_all(model affinity.model, k integer,
		exclude_seen boolean, users text[], exclude text[] DEFAULT NULL,
		candidates text[] DEFAULT NULL, fallback_popular boolean DEFAULT true,
		rules jsonb DEFAULT NULL)
	RETURNS TABLE (user_id text, item_id text, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 100000$def$,
	'affinity.top_items_for_all(affinity.model, integer, boolean, text[], text[], text[], boolean, jsonb)',
	'the k best items for every user of a text-key model (or the given users), in blocks');
DROP FUNCTION affinity.replace_function_1_3(text, text, text, text);

-- The text batch by name: users comes first, so that a call naming only the
-- users (users => ARRAY['C-17'], or NULL::text[] for all) picks this form
-- and the rest keep their defaults.
CREATE FUNCTION affinity.top_items_for_all(model affinity.model, users text[],
		k integer DEFAULT 10, exclude_seen boolean DEFAULT true,
		exclude text[] DEFAULT NULL, candidates text[] DEFAULT NULL,
		fallback_popular boolean DEFAULT true, rules jsonb DEFAULT NULL)
	RETURNS TABLE (user_id text, item_id text, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_for_all_named' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 100000;
COMMENT ON FUNCTION affinity.top_items_for_all(affinity.model, text[], integer, boolean, text[], text[], boolean, jsonb) IS 'the k best items for the given users of a text-key model (NULL: every user), in blocks';

-- Evaluation --------------------------------------------------------------
-- No object changes here: ranking_metrics keeps its signatures.  The held-out
-- statements read each model once when each model is scored in a subquery of
-- its own over the held-out rows (README, "Held-out statements"); the hint of
-- the second-model error and the final function (src/pg/metrics.c) changed.

-- Item profiles ----------------------------------------------------------

-- One transition function per kind reads its key type from the call; the
-- aggregates have no combine function (profiles.c says why), so they run
-- in one state, above a parallel scan if the planner makes one.
CREATE FUNCTION affinity.item_profiles_transfn(internal, bigint, text, real)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_profiles_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.item_profiles_vector_transfn(internal, bigint, real[])
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_profiles_vector_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.item_profiles_transfn(internal, bigint, text, real, jsonb)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_profiles_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.item_profiles_vector_transfn(internal, bigint, real[], jsonb)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_profiles_vector_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.item_profiles_transfn(internal, text, text, real)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_profiles_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.item_profiles_vector_transfn(internal, text, real[])
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_profiles_vector_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.item_profiles_transfn(internal, text, text, real, jsonb)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_profiles_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.item_profiles_vector_transfn(internal, text, real[], jsonb)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_profiles_vector_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.item_profiles_finalfn(internal)
	RETURNS affinity.model
	AS 'MODULE_PATHNAME', 'affinity_profiles_finalfn' LANGUAGE C PARALLEL SAFE;
CREATE AGGREGATE affinity.item_profiles(item_id bigint, feature text, value real) (
	SFUNC = affinity.item_profiles_transfn,
	STYPE = internal,
	FINALFUNC = affinity.item_profiles_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.item_profiles(item_id bigint, vector real[]) (
	SFUNC = affinity.item_profiles_vector_transfn,
	STYPE = internal,
	FINALFUNC = affinity.item_profiles_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.item_profiles(bigint, text, real) IS 'item profiles over (item, feature, value) rows with bigint item keys';
COMMENT ON AGGREGATE affinity.item_profiles(bigint, real[]) IS 'item profiles over (item, vector) rows with bigint item keys';
CREATE AGGREGATE affinity.item_profiles(item_id bigint, feature text, value real, options jsonb) (
	SFUNC = affinity.item_profiles_transfn,
	STYPE = internal,
	FINALFUNC = affinity.item_profiles_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.item_profiles(item_id bigint, vector real[], options jsonb) (
	SFUNC = affinity.item_profiles_vector_transfn,
	STYPE = internal,
	FINALFUNC = affinity.item_profiles_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.item_profiles(bigint, text, real, jsonb) IS 'item profiles over (item, feature, value) rows with bigint item keys; options as jsonb (normalization, min_document_frequency)';
COMMENT ON AGGREGATE affinity.item_profiles(bigint, real[], jsonb) IS 'item profiles over (item, vector) rows with bigint item keys; options as jsonb (normalization)';
CREATE AGGREGATE affinity.item_profiles(item_id text, feature text, value real) (
	SFUNC = affinity.item_profiles_transfn,
	STYPE = internal,
	FINALFUNC = affinity.item_profiles_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.item_profiles(item_id text, vector real[]) (
	SFUNC = affinity.item_profiles_vector_transfn,
	STYPE = internal,
	FINALFUNC = affinity.item_profiles_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.item_profiles(text, text, real) IS 'item profiles over (item, feature, value) rows with text item keys';
COMMENT ON AGGREGATE affinity.item_profiles(text, real[]) IS 'item profiles over (item, vector) rows with text item keys';
CREATE AGGREGATE affinity.item_profiles(item_id text, feature text, value real, options jsonb) (
	SFUNC = affinity.item_profiles_transfn,
	STYPE = internal,
	FINALFUNC = affinity.item_profiles_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.item_profiles(item_id text, vector real[], options jsonb) (
	SFUNC = affinity.item_profiles_vector_transfn,
	STYPE = internal,
	FINALFUNC = affinity.item_profiles_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.item_profiles(text, text, real, jsonb) IS 'item profiles over (item, feature, value) rows with text item keys; options as jsonb (normalization, min_document_frequency)';
COMMENT ON AGGREGATE affinity.item_profiles(text, real[], jsonb) IS 'item profiles over (item, vector) rows with text item keys; options as jsonb (normalization)';
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

-- Content-based filtering ---------------------------------------------------

-- affinity.fit with item profiles as a fifth argument, for method content:
-- each customer's preference vector over the profiles' features is the
-- ridge regression of the customer's confidence-weighted purchases on the
-- item profiles, and every item of the profiles' catalogue, bought or not,
-- is scored.  The profiles come as a scalar subquery (evaluated once).  The
-- transition functions are those of the four-argument forms, which read
-- the options from the fifth argument and the profiles from the sixth; the
-- aggregates have no combine function, so no parallel worker holds a
-- state of its own (a parallel scan below still feeds the one state).
CREATE FUNCTION affinity.fit_transfn(internal, bigint, bigint, real, jsonb, affinity.model)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_text_transfn(internal, text, text, real, jsonb, affinity.model)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_text_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_mixed_transfn(internal, bigint, text, real, jsonb, affinity.model)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_mixed_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_mixed_transfn(internal, text, bigint, real, jsonb, affinity.model)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_mixed_transfn' LANGUAGE C PARALLEL SAFE;

CREATE AGGREGATE affinity.fit(user_id bigint, item_id bigint, weight real, options jsonb,
							  profiles affinity.model) (
	SFUNC = affinity.fit_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id text, item_id text, weight real, options jsonb,
							  profiles affinity.model) (
	SFUNC = affinity.fit_text_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id bigint, item_id text, weight real, options jsonb,
							  profiles affinity.model) (
	SFUNC = affinity.fit_mixed_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id text, item_id bigint, weight real, options jsonb,
							  profiles affinity.model) (
	SFUNC = affinity.fit_mixed_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit(bigint, bigint, real, jsonb, affinity.model) IS 'fit a content model over (user, item, weight) rows and item profiles (method content); options as jsonb';
COMMENT ON AGGREGATE affinity.fit(text, text, real, jsonb, affinity.model) IS 'fit a content model over (user, item, weight) rows with text keys and item profiles (method content); options as jsonb';
COMMENT ON AGGREGATE affinity.fit(bigint, text, real, jsonb, affinity.model) IS 'fit a content model over (user, item, weight) rows with bigint user keys, text item keys and item profiles (method content); options as jsonb';
COMMENT ON AGGREGATE affinity.fit(text, bigint, real, jsonb, affinity.model) IS 'fit a content model over (user, item, weight) rows with text user keys, bigint item keys and item profiles (method content); options as jsonb';

-- Feature reasons -----------------------------------------------------------

-- For a model over item features (method content): which of an item's
-- features make up a user's score of it, largest first.  One C function
-- serves every key pair; the types of the arguments choose the overload.
CREATE FUNCTION affinity.feature_reasons(model affinity.model, user_id bigint, item_id bigint,
		k integer DEFAULT 5)
	RETURNS TABLE (feature text, contribution real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_feature_reasons' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 5;
CREATE FUNCTION affinity.feature_reasons(model affinity.model, user_id text, item_id text,
		k integer DEFAULT 5)
	RETURNS TABLE (feature text, contribution real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_feature_reasons' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 5;
CREATE FUNCTION affinity.feature_reasons(model affinity.model, user_id bigint, item_id text,
		k integer DEFAULT 5)
	RETURNS TABLE (feature text, contribution real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_feature_reasons' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 5;
CREATE FUNCTION affinity.feature_reasons(model affinity.model, user_id text, item_id bigint,
		k integer DEFAULT 5)
	RETURNS TABLE (feature text, contribution real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_feature_reasons' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 5;
COMMENT ON FUNCTION affinity.feature_reasons(affinity.model, bigint, bigint, integer) IS 'which of the item''s features make up the user''s score of it (method content), largest first';
COMMENT ON FUNCTION affinity.feature_reasons(affinity.model, text, text, integer) IS 'which of the item''s features make up the user''s score of it (method content), largest first';
COMMENT ON FUNCTION affinity.feature_reasons(affinity.model, bigint, text, integer) IS 'which of the item''s features make up the user''s score of it (method content), largest first';
COMMENT ON FUNCTION affinity.feature_reasons(affinity.model, text, bigint, integer) IS 'which of the item''s features make up the user''s score of it (method content), largest first';


-- Sequences --------------------------------------------------------------

-- affinity.fit_sequences(sequence_id, item_id, position [, options]): ordered
-- events (an order's lines, a session's views, a customer's invoices) into a
-- model value of method sequential_rules.  Sequence and item keys are bigint
-- or text each; the position is bigint (integer columns are cast to it),
-- timestamp or timestamptz.  One transition function reads the types from
-- the call.  No combine function (sequences.c says why): the aggregate runs
-- in one state, above a parallel scan if the planner makes one.
CREATE FUNCTION affinity.fit_sequences_transfn(internal, "any", "any", "any")
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_sequences_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_sequences_transfn(internal, "any", "any", "any", jsonb)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_sequences_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_sequences_finalfn(internal)
	RETURNS affinity.model
	AS 'MODULE_PATHNAME', 'affinity_fit_sequences_finalfn' LANGUAGE C PARALLEL SAFE;
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id bigint, ordered_by bigint) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, bigint, bigint) IS 'sequential rules over ordered events (bigint sequences, bigint items, bigint positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id bigint, ordered_by bigint, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, bigint, bigint, jsonb) IS 'sequential rules over ordered events (bigint sequences, bigint items, bigint positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id bigint, ordered_by timestamp) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, bigint, timestamp) IS 'sequential rules over ordered events (bigint sequences, bigint items, timestamp positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id bigint, ordered_by timestamp, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, bigint, timestamp, jsonb) IS 'sequential rules over ordered events (bigint sequences, bigint items, timestamp positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id bigint, ordered_by timestamptz) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, bigint, timestamptz) IS 'sequential rules over ordered events (bigint sequences, bigint items, timestamptz positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id bigint, ordered_by timestamptz, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, bigint, timestamptz, jsonb) IS 'sequential rules over ordered events (bigint sequences, bigint items, timestamptz positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id text, ordered_by bigint) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, text, bigint) IS 'sequential rules over ordered events (bigint sequences, text items, bigint positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id text, ordered_by bigint, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, text, bigint, jsonb) IS 'sequential rules over ordered events (bigint sequences, text items, bigint positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id text, ordered_by timestamp) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, text, timestamp) IS 'sequential rules over ordered events (bigint sequences, text items, timestamp positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id text, ordered_by timestamp, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, text, timestamp, jsonb) IS 'sequential rules over ordered events (bigint sequences, text items, timestamp positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id text, ordered_by timestamptz) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, text, timestamptz) IS 'sequential rules over ordered events (bigint sequences, text items, timestamptz positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id bigint, item_id text, ordered_by timestamptz, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(bigint, text, timestamptz, jsonb) IS 'sequential rules over ordered events (bigint sequences, text items, timestamptz positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id bigint, ordered_by bigint) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, bigint, bigint) IS 'sequential rules over ordered events (text sequences, bigint items, bigint positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id bigint, ordered_by bigint, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, bigint, bigint, jsonb) IS 'sequential rules over ordered events (text sequences, bigint items, bigint positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id bigint, ordered_by timestamp) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, bigint, timestamp) IS 'sequential rules over ordered events (text sequences, bigint items, timestamp positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id bigint, ordered_by timestamp, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, bigint, timestamp, jsonb) IS 'sequential rules over ordered events (text sequences, bigint items, timestamp positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id bigint, ordered_by timestamptz) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, bigint, timestamptz) IS 'sequential rules over ordered events (text sequences, bigint items, timestamptz positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id bigint, ordered_by timestamptz, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, bigint, timestamptz, jsonb) IS 'sequential rules over ordered events (text sequences, bigint items, timestamptz positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id text, ordered_by bigint) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, text, bigint) IS 'sequential rules over ordered events (text sequences, text items, bigint positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id text, ordered_by bigint, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, text, bigint, jsonb) IS 'sequential rules over ordered events (text sequences, text items, bigint positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id text, ordered_by timestamp) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, text, timestamp) IS 'sequential rules over ordered events (text sequences, text items, timestamp positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id text, ordered_by timestamp, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, text, timestamp, jsonb) IS 'sequential rules over ordered events (text sequences, text items, timestamp positions); options as jsonb (window, successors)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id text, ordered_by timestamptz) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, text, timestamptz) IS 'sequential rules over ordered events (text sequences, text items, timestamptz positions)';
CREATE AGGREGATE affinity.fit_sequences(sequence_id text, item_id text, ordered_by timestamptz, options jsonb) (
	SFUNC = affinity.fit_sequences_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_sequences_finalfn,
	FINALFUNC_MODIFY = READ_WRITE,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit_sequences(text, text, timestamptz, jsonb) IS 'sequential rules over ordered events (text sequences, text items, timestamptz positions); options as jsonb (window, successors)';

-- next_items: the next items of one session from its recent items in order
-- (last = most recent), or ordered by positions when given (equal
-- positions are one step, as in the fit); bigint or text items, as the
-- model's.
CREATE FUNCTION affinity.next_items(model affinity.model, recent bigint[], k integer DEFAULT 10,
		exclude bigint[] DEFAULT NULL, candidates bigint[] DEFAULT NULL, positions bigint[] DEFAULT NULL)
	RETURNS TABLE (item_id bigint, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_next_items' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
COMMENT ON FUNCTION affinity.next_items(affinity.model, bigint[], integer, bigint[], bigint[], bigint[]) IS 'the k items most likely to come next after a session''s recent items, by sequential rules';
CREATE FUNCTION affinity.next_items(model affinity.model, recent text[], k integer DEFAULT 10,
		exclude text[] DEFAULT NULL, candidates text[] DEFAULT NULL, positions bigint[] DEFAULT NULL)
	RETURNS TABLE (item_id text, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_next_items' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
COMMENT ON FUNCTION affinity.next_items(affinity.model, text[], integer, text[], text[], bigint[]) IS 'the k items most likely to come next after a session''s recent items, by sequential rules (text keys)';

-- next_items_for_all: many sessions in one call, their events as two
-- arrays of one length (element i: session, item), in order or by the
-- positions of a third array.
CREATE FUNCTION affinity.next_items_for_all(model affinity.model, session_ids bigint[], item_ids bigint[],
		k integer DEFAULT 10, exclude bigint[] DEFAULT NULL, candidates bigint[] DEFAULT NULL,
		positions bigint[] DEFAULT NULL)
	RETURNS TABLE (session_id bigint, item_id bigint, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_next_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 10000;
COMMENT ON FUNCTION affinity.next_items_for_all(affinity.model, bigint[], bigint[], integer, bigint[], bigint[], bigint[]) IS 'the k next items of each session, from the sessions'' events as (session, item) arrays in order';
CREATE FUNCTION affinity.next_items_for_all(model affinity.model, session_ids bigint[], item_ids text[],
		k integer DEFAULT 10, exclude text[] DEFAULT NULL, candidates text[] DEFAULT NULL,
		positions bigint[] DEFAULT NULL)
	RETURNS TABLE (session_id bigint, item_id text, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_next_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 10000;
COMMENT ON FUNCTION affinity.next_items_for_all(affinity.model, bigint[], text[], integer, text[], text[], bigint[]) IS 'the k next items of each session, from the sessions'' events as (session, item) arrays in order';
CREATE FUNCTION affinity.next_items_for_all(model affinity.model, session_ids text[], item_ids bigint[],
		k integer DEFAULT 10, exclude bigint[] DEFAULT NULL, candidates bigint[] DEFAULT NULL,
		positions bigint[] DEFAULT NULL)
	RETURNS TABLE (session_id text, item_id bigint, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_next_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 10000;
COMMENT ON FUNCTION affinity.next_items_for_all(affinity.model, text[], bigint[], integer, bigint[], bigint[], bigint[]) IS 'the k next items of each session, from the sessions'' events as (session, item) arrays in order';
CREATE FUNCTION affinity.next_items_for_all(model affinity.model, session_ids text[], item_ids text[],
		k integer DEFAULT 10, exclude text[] DEFAULT NULL, candidates text[] DEFAULT NULL,
		positions bigint[] DEFAULT NULL)
	RETURNS TABLE (session_id text, item_id text, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_next_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 10000;
COMMENT ON FUNCTION affinity.next_items_for_all(affinity.model, text[], text[], integer, text[], text[], bigint[]) IS 'the k next items of each session, from the sessions'' events as (session, item) arrays in order';
