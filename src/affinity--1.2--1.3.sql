/* src/affinity--1.2--1.3.sql */

-- complain if script is sourced in psql, rather than via ALTER EXTENSION
\echo Use "ALTER EXTENSION affinity UPDATE TO '1.3'" to load this file. \quit

-- 1.3, in sections:
--   Mixed keys: bigint users with text items and text users with bigint
--     items, in the fit, the serving functions and the registry.
--   Serving: where each row came from, the batch's filters and fallback,
--     one order of the leading arguments.
--   Evaluation: held-out statements that do not copy a model per row.
--   Item profiles: the item x feature matrix of a catalogue as a model
--     value (feature rows or dense vectors), served by items_like.
-- Each section stands alone; later changes of 1.3 go in sections of their
-- own at the end.

-- Mixed keys --------------------------------------------------------------

-- Serving -----------------------------------------------------------------

-- top_items and top_items_for_all gain a result column, source, saying
-- where each row came from: 'personal' (the user's own scores), 'basket'
-- (scores from the basket given), 'popular' (the model's popularity: an
-- unknown user or a basket of unknown items falling back, or a popularity
-- model).  The batch gains exclude, candidates and fallback_popular, as
-- top_items has, and serves unknown users as top_items does; the basket form
-- takes its arguments in the user form's order (model, key, k, exclude_seen,
-- exclude, candidates, fallback_popular), with weights last.  A result type
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
		candidates bigint[] DEFAULT NULL, fallback_popular boolean DEFAULT true)
	RETURNS TABLE (item_id bigint, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10$def$,
	'affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean)',
	'the k best items for a user; source says whether a row is personal or a popular fallback');
SELECT affinity.replace_function_1_3(
	'affinity.top_items(affinity.model, text, integer, boolean, text[], text[], boolean)',
	$def$CREATE FUNCTION affinity.top_items(model affinity.model, user_id text, k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, exclude text[] DEFAULT NULL,
		candidates text[] DEFAULT NULL, fallback_popular boolean DEFAULT true)
	RETURNS TABLE (item_id text, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10$def$,
	'affinity.top_items(affinity.model, text, integer, boolean, text[], text[], boolean)',
	'the k best items for a user (text keys); source says whether a row is personal or a popular fallback');
SELECT affinity.replace_function_1_3(
	'affinity.top_items(affinity.model, bigint[], integer, real[], boolean, bigint[], bigint[])',
	$def$CREATE FUNCTION affinity.top_items(model affinity.model, basket bigint[], k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, exclude bigint[] DEFAULT NULL,
		candidates bigint[] DEFAULT NULL, fallback_popular boolean DEFAULT true,
		weights real[] DEFAULT NULL)
	RETURNS TABLE (item_id bigint, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_basket' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10$def$,
	'affinity.top_items(affinity.model, bigint[], integer, boolean, bigint[], bigint[], boolean, real[])',
	'the k best items for a basket of items (a user the model has not seen)');
SELECT affinity.replace_function_1_3(
	'affinity.top_items(affinity.model, text[], integer, real[], boolean, text[], text[])',
	$def$CREATE FUNCTION affinity.top_items(model affinity.model, basket text[], k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, exclude text[] DEFAULT NULL,
		candidates text[] DEFAULT NULL, fallback_popular boolean DEFAULT true,
		weights real[] DEFAULT NULL)
	RETURNS TABLE (item_id text, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_basket' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10$def$,
	'affinity.top_items(affinity.model, text[], integer, boolean, text[], text[], boolean, real[])',
	'the k best items for a basket of items with text keys (a user the model has not seen)');
SELECT affinity.replace_function_1_3(
	'affinity.top_items_for_all(affinity.model, integer, boolean, bigint[])',
	$def$CREATE FUNCTION affinity.top_items_for_all(model affinity.model, k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, users bigint[] DEFAULT NULL,
		exclude bigint[] DEFAULT NULL, candidates bigint[] DEFAULT NULL,
		fallback_popular boolean DEFAULT true)
	RETURNS TABLE (user_id bigint, item_id bigint, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 100000$def$,
	'affinity.top_items_for_all(affinity.model, integer, boolean, bigint[], bigint[], bigint[], boolean)',
	'the k best items for every user of the model (or the given users), in blocks');
-- the 1.1 positional text form, kept for the calls written for it
SELECT affinity.replace_function_1_3(
	'affinity.top_items_for_all(affinity.model, integer, boolean, text[])',
	$def$CREATE FUNCTION affinity.top_items_for_all(model affinity.model, k integer,
		exclude_seen boolean, users text[], exclude text[] DEFAULT NULL,
		candidates text[] DEFAULT NULL, fallback_popular boolean DEFAULT true)
	RETURNS TABLE (user_id text, item_id text, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 100000$def$,
	'affinity.top_items_for_all(affinity.model, integer, boolean, text[], text[], text[], boolean)',
	'the k best items for every user of a text-key model (or the given users), in blocks');
DROP FUNCTION affinity.replace_function_1_3(text, text, text, text);

-- The text batch by name: users comes first, so that a call naming only the
-- users (users => ARRAY['C-17'], or NULL::text[] for all) picks this form
-- and the rest keep their defaults.
CREATE FUNCTION affinity.top_items_for_all(model affinity.model, users text[],
		k integer DEFAULT 10, exclude_seen boolean DEFAULT true,
		exclude text[] DEFAULT NULL, candidates text[] DEFAULT NULL,
		fallback_popular boolean DEFAULT true)
	RETURNS TABLE (user_id text, item_id text, score real, rank integer, source text)
	AS 'MODULE_PATHNAME', 'affinity_top_items_for_all_named' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 100000;
COMMENT ON FUNCTION affinity.top_items_for_all(affinity.model, text[], integer, boolean, text[], text[], boolean) IS 'the k best items for the given users of a text-key model (NULL: every user), in blocks';

-- Evaluation --------------------------------------------------------------

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
