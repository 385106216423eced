--
-- The affinity.model type: text and binary round trips, and rejection of
-- damaged values.
--
SET extra_float_digits = 0;

-- A small planted data set: users 1-30 buy items 1-12, users 31-60 buy
-- items 13-24, each user about half of their group's items (chosen by a
-- hash, so there is no pattern inside a group).
CREATE TABLE type_buys AS
SELECT u::bigint AS user_id,
       (CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)::bigint AS item_id,
       (1 + (u * i) % 3)::real AS weight
FROM generate_series(1, 60) u, generate_series(1, 12) i
WHERE abs(hashint4(u * 1000 + i)) % 100 < 55;

CREATE TABLE type_models AS
SELECT affinity.fit(user_id, item_id, weight,
                    '{"factors": 4, "iterations": 5, "threads": 1}') AS model
FROM type_buys;

SELECT pg_typeof(model), affinity.describe(model)->>'format_version' AS format_version,
       (affinity.describe(model)->>'size_bytes')::int > 1000 AS has_bytes
FROM type_models;

-- text round trip: same bytes, so same checksum and same answers
SELECT affinity.describe(model::text::affinity.model)->>'checksum'
       = affinity.describe(model)->>'checksum' AS text_round_trip
FROM type_models;
SELECT model::text = model::text::affinity.model::text AS text_stable FROM type_models;

-- binary round trip through COPY (receive runs the same validation); psql's
-- \copy keeps the file on the client side, in pg_regress's results/ directory
\copy type_models TO 'results/type_model.bin' WITH (FORMAT binary)
CREATE TABLE type_models_back (model affinity.model);
\copy type_models_back FROM 'results/type_model.bin' WITH (FORMAT binary)
SELECT a.model::text = b.model::text AS binary_round_trip
FROM type_models a, type_models_back b;

-- send gives the value's bytes after the length word
SELECT length(affinity.model_send(model)) = (affinity.describe(model)->>'size_bytes')::int - 4
       AS send_length
FROM type_models;

-- storage: out of line and never compressed
SELECT typstorage, typalign FROM pg_type WHERE oid = 'affinity.model'::regtype;

-- damaged values are rejected with a clear error

-- not base64
SELECT 'not a model!'::affinity.model;
-- too short
SELECT 'QUZNRA=='::affinity.model;
-- truncated: the header's size no longer matches
SELECT encode(substring(decode(model::text, 'base64') FROM 1 FOR 400), 'base64')::affinity.model
FROM type_models;
-- one byte changed inside the factors: checksum mismatch
SELECT encode(overlay(decode(model::text, 'base64') PLACING '\x7f'::bytea FROM 700 FOR 1), 'base64')::affinity.model
FROM type_models;
-- wrong signature
SELECT encode(overlay(decode(model::text, 'base64') PLACING 'XXXX'::bytea FROM 1 FOR 4), 'base64')::affinity.model
FROM type_models;
-- a newer format version
SELECT encode(overlay(decode(model::text, 'base64') PLACING '\x0900'::bytea FROM 5 FOR 2), 'base64')::affinity.model
FROM type_models;
-- a section count larger than exists
SELECT encode(overlay(decode(model::text, 'base64') PLACING '\x6300'::bytea FROM 11 FOR 2), 'base64')::affinity.model
FROM type_models;

-- describe() lists the value's sections by name (from the format's section
-- table) with their element counts and bytes; they fit in the value
WITH m AS (
  SELECT affinity.fit(u, i, 1::real, '{"factors": 2, "iterations": 1, "threads": 1}') AS model
  FROM (VALUES (1::bigint, 10::bigint), (1, 11), (2, 11), (3, 12)) v(u, i))
SELECT s.key AS section, (s.value->>'count')::bigint AS count, (s.value->>'bytes')::bigint AS bytes
FROM m, jsonb_each(affinity.describe(model)->'sections') s
ORDER BY s.key;
WITH d AS (
  SELECT affinity.describe(affinity.fit(u::text, i::text, 1::real, '{"method": "popularity"}')) AS d
  FROM (VALUES (1, 10), (1, 11), (2, 11), (3, 12)) v(u, i))
SELECT count(*) AS sections,
       sum((s.value->>'bytes')::bigint) < min((d->>'size_bytes')::bigint) AS fit_in_value
FROM d, jsonb_each(d->'sections') s;
