/* src/affinity--1.2--1.3.sql */

-- complain if script is sourced in psql, rather than via ALTER EXTENSION
\echo Use "ALTER EXTENSION affinity UPDATE TO '1.3'" to load this file. \quit

-- 1.3, in sections:
--   Mixed keys: bigint users with text items and text users with bigint
--     items, in the fit, the serving functions and the registry.
--   Serving: where each row came from, the batch's filters and fallback,
--     one order of the leading arguments.
--   Evaluation: held-out statements that do not copy a model per row.
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

-- Evaluation --------------------------------------------------------------
