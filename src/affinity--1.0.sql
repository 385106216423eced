/* src/affinity--1.0.sql */

-- complain if script is sourced in psql, rather than via CREATE EXTENSION
\echo Use "CREATE EXTENSION affinity" to load this file. \quit

-- Any role may use the extension's functions; what it can fit from or serve
-- is governed by the privileges on its own tables.
GRANT USAGE ON SCHEMA affinity TO PUBLIC;

-- The model type ---------------------------------------------------------

CREATE TYPE affinity.model;

CREATE FUNCTION affinity.model_in(cstring) RETURNS affinity.model
	AS 'MODULE_PATHNAME', 'affinity_model_in' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.model_out(affinity.model) RETURNS cstring
	AS 'MODULE_PATHNAME', 'affinity_model_out' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.model_recv(internal) RETURNS affinity.model
	AS 'MODULE_PATHNAME', 'affinity_model_recv' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.model_send(affinity.model) RETURNS bytea
	AS 'MODULE_PATHNAME', 'affinity_model_send' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;

CREATE TYPE affinity.model (
	INPUT = affinity.model_in,
	OUTPUT = affinity.model_out,
	RECEIVE = affinity.model_recv,
	SEND = affinity.model_send,
	INTERNALLENGTH = VARIABLE,
	ALIGNMENT = double,
	STORAGE = external
);
COMMENT ON TYPE affinity.model IS 'a fitted recommendation model: method, options, key dictionaries, factors, training lists and fit statistics';

-- Fitting ----------------------------------------------------------------

CREATE FUNCTION affinity.fit_transfn(internal, bigint, bigint, real)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_transfn(internal, bigint, bigint, real, jsonb)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_finalfn(internal)
	RETURNS affinity.model
	AS 'MODULE_PATHNAME', 'affinity_fit_finalfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_combinefn(internal, internal)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_combinefn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_serialfn(internal)
	RETURNS bytea
	AS 'MODULE_PATHNAME', 'affinity_fit_serialfn' LANGUAGE C STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.fit_deserialfn(bytea, internal)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_deserialfn' LANGUAGE C STRICT PARALLEL SAFE;

CREATE AGGREGATE affinity.fit(user_id bigint, item_id bigint, weight real) (
	SFUNC = affinity.fit_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id bigint, item_id bigint, weight real, options jsonb) (
	SFUNC = affinity.fit_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit(bigint, bigint, real) IS 'fit a model over (user, item, weight) rows with default options';
COMMENT ON AGGREGATE affinity.fit(bigint, bigint, real, jsonb) IS 'fit a model over (user, item, weight) rows; options as jsonb';

-- Serving ----------------------------------------------------------------

CREATE FUNCTION affinity.top_items(model affinity.model, user_id bigint, k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, exclude bigint[] DEFAULT NULL,
		candidates bigint[] DEFAULT NULL, fallback_popular boolean DEFAULT true)
	RETURNS TABLE (item_id bigint, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_top_items' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
COMMENT ON FUNCTION affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean) IS 'the k best items for a known user';

CREATE FUNCTION affinity.top_items(model affinity.model, basket bigint[], k integer DEFAULT 10,
		weights real[] DEFAULT NULL, exclude_seen boolean DEFAULT true,
		exclude bigint[] DEFAULT NULL, candidates bigint[] DEFAULT NULL)
	RETURNS TABLE (item_id bigint, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_top_items_basket' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
COMMENT ON FUNCTION affinity.top_items(affinity.model, bigint[], integer, real[], boolean, bigint[], bigint[]) IS 'the k best items for a basket of items (a user the model has not seen)';

CREATE FUNCTION affinity.top_items_for_all(model affinity.model, k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, users bigint[] DEFAULT NULL)
	RETURNS TABLE (user_id bigint, item_id bigint, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_top_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 100000;
COMMENT ON FUNCTION affinity.top_items_for_all(affinity.model, integer, boolean, bigint[]) IS 'the k best items for every user of the model (or the given users), in blocks';

CREATE FUNCTION affinity.users_like(model affinity.model, user_id bigint, k integer DEFAULT 10)
	RETURNS TABLE (user_id bigint, similarity real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_users_like' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
COMMENT ON FUNCTION affinity.users_like(affinity.model, bigint, integer) IS 'the k users nearest to a user by cosine of their factors';

CREATE FUNCTION affinity.reasons(model affinity.model, user_id bigint, item_id bigint, k integer DEFAULT 5)
	RETURNS TABLE (past_item_id bigint, contribution real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_reasons' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 5;
COMMENT ON FUNCTION affinity.reasons(affinity.model, bigint, bigint, integer) IS 'which training items of the user push this item up, and by how much';

CREATE FUNCTION affinity.items_like(model affinity.model, item_id bigint, k integer DEFAULT 10,
		candidates bigint[] DEFAULT NULL)
	RETURNS TABLE (item_id bigint, similarity real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_items_like' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
COMMENT ON FUNCTION affinity.items_like(affinity.model, bigint, integer, bigint[]) IS 'the k items nearest to an item by cosine of their factors';

CREATE FUNCTION affinity.score(model affinity.model, user_id bigint, item_id bigint)
	RETURNS real
	AS 'MODULE_PATHNAME', 'affinity_score' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
COMMENT ON FUNCTION affinity.score(affinity.model, bigint, bigint) IS 'the model''s score for one user and item, NULL when either is unknown';

CREATE FUNCTION affinity.user_vector(model affinity.model, user_id bigint)
	RETURNS real[]
	AS 'MODULE_PATHNAME', 'affinity_user_vector' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.item_vector(model affinity.model, item_id bigint)
	RETURNS real[]
	AS 'MODULE_PATHNAME', 'affinity_item_vector' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.user_vectors(model affinity.model)
	RETURNS TABLE (user_id bigint, vector real[])
	AS 'MODULE_PATHNAME', 'affinity_user_vectors' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE
	COST 10000 ROWS 10000;
CREATE FUNCTION affinity.item_vectors(model affinity.model)
	RETURNS TABLE (item_id bigint, vector real[])
	AS 'MODULE_PATHNAME', 'affinity_item_vectors' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE
	COST 10000 ROWS 1000;

-- Evaluation -------------------------------------------------------------

CREATE FUNCTION affinity.ranking_metrics_transfn(internal, affinity.model, bigint, bigint, integer)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.ranking_metrics_transfn(internal, affinity.model, bigint, bigint)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.ranking_metrics_combinefn(internal, internal)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_combinefn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.ranking_metrics_serialfn(internal)
	RETURNS bytea
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_serialfn' LANGUAGE C STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.ranking_metrics_deserialfn(bytea, internal)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_deserialfn' LANGUAGE C STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.ranking_metrics_finalfn(internal)
	RETURNS jsonb
	AS 'MODULE_PATHNAME', 'affinity_ranking_metrics_finalfn' LANGUAGE C PARALLEL SAFE;

CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id bigint, item_id bigint, k integer) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.ranking_metrics(model affinity.model, user_id bigint, item_id bigint) (
	SFUNC = affinity.ranking_metrics_transfn,
	STYPE = internal,
	FINALFUNC = affinity.ranking_metrics_finalfn,
	COMBINEFUNC = affinity.ranking_metrics_combinefn,
	SERIALFUNC = affinity.ranking_metrics_serialfn,
	DESERIALFUNC = affinity.ranking_metrics_deserialfn,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, bigint, bigint) IS 'ranking metrics at k = 10 over held-out (user, item) rows';
COMMENT ON AGGREGATE affinity.ranking_metrics(affinity.model, bigint, bigint, integer) IS 'precision, recall, NDCG, MAP, hit rate and coverage at k over held-out (user, item) rows';

CREATE FUNCTION affinity.describe(model affinity.model)
	RETURNS jsonb
	AS 'MODULE_PATHNAME', 'affinity_describe' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
COMMENT ON FUNCTION affinity.describe(affinity.model) IS 'method, options as used, counts, loss per sweep, timings, size and checksum of a model';

CREATE FUNCTION affinity.runtime()
	RETURNS jsonb
	AS 'MODULE_PATHNAME', 'affinity_runtime' LANGUAGE C VOLATILE PARALLEL SAFE;
COMMENT ON FUNCTION affinity.runtime() IS 'extension version, BLAS library and kernel, thread settings, CPU features';
