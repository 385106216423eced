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
