/* src/affinity--1.0--1.1.sql */

-- complain if script is sourced in psql, rather than via ALTER EXTENSION
\echo Use "ALTER EXTENSION affinity UPDATE TO '1.1'" to load this file. \quit

-- 1.1: the model registry (named models refreshed from a stored query, with
-- a history for going back), and forget_user.

-- The registry ------------------------------------------------------------

CREATE TABLE affinity.models (
	name text PRIMARY KEY,
	source_query text NOT NULL,
	options jsonb NOT NULL DEFAULT '{}',
	search_path text NOT NULL DEFAULT '',	-- the definer's, for the query's names
	owner name NOT NULL DEFAULT current_user,	-- the query runs as this role
	keep_versions integer NOT NULL DEFAULT 3 CHECK (keep_versions >= 1),
	version integer NOT NULL DEFAULT 0,
	model affinity.model,
	fitted_at timestamptz,
	stats jsonb
);
COMMENT ON TABLE affinity.models IS 'named models: the query that feeds each fit, its options, and the current model';

CREATE TABLE affinity.model_history (
	name text NOT NULL REFERENCES affinity.models (name) ON DELETE CASCADE ON UPDATE CASCADE,
	version integer NOT NULL,
	model affinity.model NOT NULL,
	fitted_at timestamptz NOT NULL,
	stats jsonb,
	PRIMARY KEY (name, version)
);
COMMENT ON TABLE affinity.model_history IS 'the last keep_versions models of each name, for affinity.revert_model';

-- Whoever writes a model's query (or its search_path) becomes its owner, and
-- refresh runs the query as the owner: a role allowed to change a query can
-- never make another role's refresh run code with that role's rights.
CREATE FUNCTION affinity.models_set_owner()
	RETURNS trigger
	LANGUAGE plpgsql
	SET search_path = pg_catalog, pg_temp
AS $$
BEGIN
	IF TG_OP = 'INSERT'
	   OR NEW.source_query IS DISTINCT FROM OLD.source_query
	   OR NEW.search_path IS DISTINCT FROM OLD.search_path
	   OR NEW.owner IS DISTINCT FROM OLD.owner THEN
		NEW.owner := current_user;
	END IF;
	RETURN NEW;
END
$$;
CREATE TRIGGER models_set_owner BEFORE INSERT OR UPDATE ON affinity.models
	FOR EACH ROW EXECUTE FUNCTION affinity.models_set_owner();

-- pg_dump keeps the rows of both tables
SELECT pg_catalog.pg_extension_config_dump('affinity.models', '');
SELECT pg_catalog.pg_extension_config_dump('affinity.model_history', '');

-- The source query's names are resolved at every refresh with the search
-- path given here; the default is evaluated in the caller's session (a
-- parameter default is filled in at the call), so it is the definer's path.
CREATE FUNCTION affinity.define_model(name text, source_query text, options jsonb DEFAULT '{}',
		query_search_path text DEFAULT pg_catalog.current_setting('search_path'))
	RETURNS void
	LANGUAGE plpgsql VOLATILE
	SET search_path = pg_catalog, pg_temp
AS $$
BEGIN
	IF name IS NULL OR source_query IS NULL OR options IS NULL OR query_search_path IS NULL THEN
		RAISE EXCEPTION 'name, source_query and options must not be NULL'
			USING ERRCODE = 'null_value_not_allowed';
	END IF;
	IF pg_catalog.jsonb_typeof(options) OPERATOR(pg_catalog.<>) 'object' THEN
		RAISE EXCEPTION 'options must be a jsonb object'
			USING ERRCODE = 'invalid_parameter_value',
				  DETAIL = pg_catalog.format('The options given are %s.', options);
	END IF;
	-- the query must yield user_id, item_id and weight
	PERFORM pg_catalog.set_config('search_path', query_search_path, true);
	BEGIN
		EXECUTE pg_catalog.format('SELECT user_id::bigint, item_id::bigint, weight::real FROM (%s) AS q LIMIT 0',
								  source_query);
	EXCEPTION WHEN OTHERS THEN
		RAISE EXCEPTION 'the source query of model "%" cannot feed a fit', name
			USING ERRCODE = 'invalid_parameter_value',
				  DETAIL = SQLERRM,
				  HINT = 'The query must yield columns user_id, item_id and weight (castable to bigint, bigint, real).';
	END;
	PERFORM pg_catalog.set_config('search_path', 'pg_catalog, pg_temp', true);
	INSERT INTO affinity.models AS m (name, source_query, options, search_path)
	VALUES (define_model.name, define_model.source_query, define_model.options,
			define_model.query_search_path)
	ON CONFLICT ON CONSTRAINT models_pkey DO UPDATE
		SET source_query = EXCLUDED.source_query, options = EXCLUDED.options,
			search_path = EXCLUDED.search_path;
END
$$;
COMMENT ON FUNCTION affinity.define_model(text, text, jsonb, text) IS 'register (or redefine) a named model: the query that yields user_id, item_id, weight, and the fit options';

CREATE FUNCTION affinity.refresh(name text)
	RETURNS jsonb
	LANGUAGE plpgsql VOLATILE
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	r affinity.models;
	fitted affinity.model;
	started timestamptz := clock_timestamp();
	d jsonb;
	result jsonb;
	new_version integer;
	caller_role text;
	msg text;
	detail text;
BEGIN
	-- one refresh of a name at a time: a second one waits for the first
	SELECT * INTO r FROM affinity.models m WHERE m.name = refresh.name FOR UPDATE;
	IF NOT FOUND THEN
		RAISE EXCEPTION 'no model named "%"', name
			USING ERRCODE = 'undefined_object',
				  HINT = 'Register it first with affinity.define_model(name, source_query, options).';
	END IF;
	-- the query runs as its owner, with the names as its owner saw them
	caller_role := current_setting('role');
	IF r.owner <> current_user THEN
		BEGIN
			PERFORM set_config('role', r.owner, true);
		EXCEPTION WHEN insufficient_privilege THEN
			RAISE EXCEPTION 'refresh of model "%" must run as a member of its owner %', name, r.owner
				USING ERRCODE = 'insufficient_privilege',
					  DETAIL = pg_catalog.format('The model''s query was last written by %s; it runs with that role''s rights.', r.owner),
					  HINT = pg_catalog.format('Call refresh as %s (or a member of it), or redefine the model as the calling role.', r.owner);
		END;
	END IF;
	PERFORM set_config('search_path', r.search_path, true);
	BEGIN
		EXECUTE format('SELECT affinity.fit(user_id::bigint, item_id::bigint, weight::real, $1) FROM (%s) AS q',
					   r.source_query)
			INTO fitted USING r.options;
		PERFORM set_config('search_path', 'pg_catalog, pg_temp', true);
		PERFORM set_config('role', caller_role, true);
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
		'name', name, 'version', new_version, 'method', d->'method',
		'rows', d->'rows_read', 'users', d->'users', 'items', d->'items',
		'interactions', d->'interactions', 'fit_seconds', d->'fit_seconds',
		'seconds', extract(epoch FROM clock_timestamp() - started),
		'final_loss', d->'loss'->-1, 'size_bytes', d->'size_bytes');
	UPDATE affinity.models m
		SET model = fitted, version = new_version, fitted_at = now(), stats = result
		WHERE m.name = refresh.name;
	INSERT INTO affinity.model_history (name, version, model, fitted_at, stats)
		VALUES (name, new_version, fitted, now(), result);
	DELETE FROM affinity.model_history h
		WHERE h.name = refresh.name AND h.version <= new_version - r.keep_versions;
	RETURN result;
END
$$;
COMMENT ON FUNCTION affinity.refresh(text) IS 'refit a named model from its stored query and make it current, in one transaction';

CREATE FUNCTION affinity.get_model(name text)
	RETURNS affinity.model
	LANGUAGE plpgsql STABLE PARALLEL SAFE
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	m affinity.model;
	found_row boolean;
BEGIN
	SELECT true, x.model INTO found_row, m FROM affinity.models x WHERE x.name = get_model.name;
	IF found_row IS NULL THEN
		RAISE EXCEPTION 'no model named "%"', name
			USING ERRCODE = 'undefined_object',
				  HINT = 'Registered models are listed in affinity.models.';
	END IF;
	IF m IS NULL THEN
		RAISE EXCEPTION 'model "%" has not been fitted yet', name
			USING ERRCODE = 'object_not_in_prerequisite_state',
				  HINT = format('Run SELECT affinity.refresh(%L).', name);
	END IF;
	RETURN m;
END
$$;
COMMENT ON FUNCTION affinity.get_model(text) IS 'the current model of a name';

CREATE FUNCTION affinity.revert_model(name text, to_version integer DEFAULT NULL)
	RETURNS jsonb
	LANGUAGE plpgsql VOLATILE
	SET search_path = pg_catalog, pg_temp
AS $$
DECLARE
	r affinity.models;
	h affinity.model_history;
BEGIN
	SELECT * INTO r FROM affinity.models m WHERE m.name = revert_model.name FOR UPDATE;
	IF NOT FOUND THEN
		RAISE EXCEPTION 'no model named "%"', name USING ERRCODE = 'undefined_object';
	END IF;
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
	UPDATE affinity.models m
		SET model = h.model, version = h.version, fitted_at = h.fitted_at, stats = h.stats
		WHERE m.name = revert_model.name;
	RETURN jsonb_build_object('name', name, 'version', h.version, 'fitted_at', h.fitted_at);
END
$$;
COMMENT ON FUNCTION affinity.revert_model(text, integer) IS 'make an earlier version of a named model current again (default: the one before the current)';

-- Erasure -----------------------------------------------------------------

CREATE FUNCTION affinity.forget_user(model affinity.model, user_id bigint)
	RETURNS affinity.model
	AS 'MODULE_PATHNAME', 'affinity_forget_user' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
COMMENT ON FUNCTION affinity.forget_user(affinity.model, bigint) IS 'a copy of the model without the user''s vector and training items (refit to remove their influence on items)';

-- Text keys ---------------------------------------------------------------
-- The same C functions serve both key types: they read the key type from
-- the SQL signature and refuse a model whose keys are of the other type.

CREATE FUNCTION affinity.fit_text_transfn(internal, text, text, real)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_text_transfn' LANGUAGE C PARALLEL SAFE;
CREATE FUNCTION affinity.fit_text_transfn(internal, text, text, real, jsonb)
	RETURNS internal
	AS 'MODULE_PATHNAME', 'affinity_fit_text_transfn' LANGUAGE C PARALLEL SAFE;

CREATE AGGREGATE affinity.fit(user_id text, item_id text, weight real) (
	SFUNC = affinity.fit_text_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
CREATE AGGREGATE affinity.fit(user_id text, item_id text, weight real, options jsonb) (
	SFUNC = affinity.fit_text_transfn,
	STYPE = internal,
	FINALFUNC = affinity.fit_finalfn,
	COMBINEFUNC = affinity.fit_combinefn,
	SERIALFUNC = affinity.fit_serialfn,
	DESERIALFUNC = affinity.fit_deserialfn,
	PARALLEL = SAFE
);
COMMENT ON AGGREGATE affinity.fit(text, text, real) IS 'fit a model over (user, item, weight) rows with text keys';
COMMENT ON AGGREGATE affinity.fit(text, text, real, jsonb) IS 'fit a model over (user, item, weight) rows with text keys; options as jsonb';

CREATE FUNCTION affinity.top_items(model affinity.model, user_id text, k integer DEFAULT 10,
		exclude_seen boolean DEFAULT true, exclude text[] DEFAULT NULL,
		candidates text[] DEFAULT NULL, fallback_popular boolean DEFAULT true)
	RETURNS TABLE (item_id text, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_top_items' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
CREATE FUNCTION affinity.top_items(model affinity.model, basket text[], k integer DEFAULT 10,
		weights real[] DEFAULT NULL, exclude_seen boolean DEFAULT true,
		exclude text[] DEFAULT NULL, candidates text[] DEFAULT NULL)
	RETURNS TABLE (item_id text, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_top_items_basket' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
-- no default for users: the list's type picks this overload (NULL::text[] = all users)
CREATE FUNCTION affinity.top_items_for_all(model affinity.model, k integer,
		exclude_seen boolean, users text[])
	RETURNS TABLE (user_id text, item_id text, score real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_top_items_for_all' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 100000 ROWS 100000;
CREATE FUNCTION affinity.items_like(model affinity.model, item_id text, k integer DEFAULT 10,
		candidates text[] DEFAULT NULL)
	RETURNS TABLE (item_id text, similarity real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_items_like' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
CREATE FUNCTION affinity.users_like(model affinity.model, user_id text, k integer DEFAULT 10)
	RETURNS TABLE (user_id text, similarity real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_users_like' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 10;
CREATE FUNCTION affinity.score(model affinity.model, user_id text, item_id text)
	RETURNS real
	AS 'MODULE_PATHNAME', 'affinity_score' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.reasons(model affinity.model, user_id text, item_id text, k integer DEFAULT 5)
	RETURNS TABLE (past_item_id text, contribution real, rank integer)
	AS 'MODULE_PATHNAME', 'affinity_reasons' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 1000 ROWS 5;
CREATE FUNCTION affinity.user_vector(model affinity.model, user_id text)
	RETURNS real[]
	AS 'MODULE_PATHNAME', 'affinity_user_vector' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
CREATE FUNCTION affinity.item_vector(model affinity.model, item_id text)
	RETURNS real[]
	AS 'MODULE_PATHNAME', 'affinity_item_vector' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
-- the list's type picks these overloads (NULL::text[] = all)
CREATE FUNCTION affinity.user_vectors(model affinity.model, users text[])
	RETURNS TABLE (user_id text, vector real[])
	AS 'MODULE_PATHNAME', 'affinity_user_vectors' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 10000 ROWS 10000;
CREATE FUNCTION affinity.item_vectors(model affinity.model, items text[])
	RETURNS TABLE (item_id text, vector real[])
	AS 'MODULE_PATHNAME', 'affinity_item_vectors' LANGUAGE C IMMUTABLE PARALLEL SAFE
	COST 10000 ROWS 1000;
CREATE FUNCTION affinity.forget_user(model affinity.model, user_id text)
	RETURNS affinity.model
	AS 'MODULE_PATHNAME', 'affinity_forget_user' LANGUAGE C IMMUTABLE STRICT PARALLEL SAFE;
