-- Item profiles: a catalogue's item x feature matrix as a model value, and
-- content look-alikes for every item, bought or not.  The shop is the
-- invented Fernhollow General Store; the lamps are new this season.
SET extra_float_digits = 0;

CREATE TABLE lamp_catalogue (sku bigint PRIMARY KEY, code text, category text,
							 price numeric, description text);
INSERT INTO lamp_catalogue VALUES
 (101, 'FH-101', 'lighting', 24.00, 'brass reading lamp with linen shade'),
 (102, 'FH-102', 'lighting', 26.50, 'brass desk lamp with green glass shade'),
 (103, 'FH-103', 'lighting', 12.00, 'clip-on reading light, battery'),
 (104, 'FH-104', 'lighting', 39.00, 'floor lamp with linen shade, oak stand'),
 (201, 'FH-201', 'kitchen', 9.50, 'oak cutting board'),
 (202, 'FH-202', 'kitchen', 14.00, 'enamel kettle, green'),
 (203, 'FH-203', 'kitchen', 4.00, 'linen tea towel, set of two');

-- feature rows: words of the description (PostgreSQL's own text search),
-- the category and a price band one-hot
CREATE TABLE lamp_features AS
SELECT sku, 'word:' || w AS feature, 1::real AS value
  FROM lamp_catalogue, unnest(tsvector_to_array(to_tsvector('english', description))) AS w
UNION ALL
SELECT sku, 'category:' || category, 1 FROM lamp_catalogue
UNION ALL
SELECT sku, 'price:' || CASE WHEN price < 10 THEN 'low' WHEN price < 30 THEN 'mid' ELSE 'high' END, 1
  FROM lamp_catalogue;

CREATE TABLE profs AS
SELECT 'words' AS name, affinity.item_profiles(sku, feature, value) AS p FROM lamp_features;
INSERT INTO profs
SELECT 'tfidf', affinity.item_profiles(sku, feature, value, '{"normalization": "tfidf"}') FROM lamp_features;
INSERT INTO profs
SELECT 'codes', affinity.item_profiles(code, feature, value, '{"normalization": "none", "min_document_frequency": 2}')
  FROM lamp_features JOIN lamp_catalogue USING (sku);

SELECT name, affinity.describe(p)->'method' AS method, affinity.describe(p)->'key_type' AS keys,
	   affinity.describe(p)->'users' AS users, affinity.describe(p)->'profile' AS profile
  FROM profs ORDER BY name;

-- repeated (item, feature) rows are summed; zero values are skipped
SELECT affinity.describe(p)->'duplicates_summed' AS summed,
	   affinity.describe(p)->'rows_skipped_zero' AS zero,
	   affinity.describe(p)->'profile'->'nonzeros' AS nonzeros
  FROM (SELECT affinity.item_profiles(i, f, v) AS p
		  FROM (VALUES (1, 'a', 1), (1, 'a', 2), (1, 'b', 0), (2, 'a', 1), (2, 'c', 1)) AS t(i, f, v)) s;

-- look-alikes of the floor lamp: every item with a shared feature, by cosine
SELECT item_id, round(similarity::numeric, 4) AS similarity, rank
  FROM profs, affinity.items_like(p, 104::bigint, 5) WHERE name = 'words';
-- the same by tf-idf: rare words weigh more
SELECT item_id, round(similarity::numeric, 4) AS similarity, rank
  FROM profs, affinity.items_like(p, 104::bigint, 3) WHERE name = 'tfidf';
-- only what is in stock
SELECT item_id, round(similarity::numeric, 4) AS similarity, rank
  FROM profs, affinity.items_like(p, 104::bigint, 5, ARRAY[103, 201, 203]::bigint[]) WHERE name = 'words';
-- text keys; min_document_frequency 2 drops the features of one item only
SELECT item_id, round(similarity::numeric, 4) AS similarity, rank
  FROM profs, affinity.items_like(p, 'FH-101', 3) WHERE name = 'codes';
SELECT item_id, rank
  FROM profs, affinity.items_like(p, 'FH-101', 3, ARRAY['FH-104', 'FH-203', 'nope']) WHERE name = 'codes';
-- an unknown item has no look-alikes
SELECT count(*) FROM profs, affinity.items_like(p, 999::bigint, 3) WHERE name = 'words';

-- the value round-trips through its text form and keeps its look-alikes
SELECT (SELECT array_agg(item_id ORDER BY rank) FROM affinity.items_like(p::text::affinity.model, 101::bigint, 6))
	 = (SELECT array_agg(item_id ORDER BY rank) FROM affinity.items_like(p, 101::bigint, 6)) AS same
  FROM profs WHERE name = 'tfidf';

-- dense vectors made elsewhere (say by an image model)
CREATE TABLE lamp_vectors (sku bigint, code text, v real[]);
INSERT INTO lamp_vectors VALUES
 (101, 'FH-101', '{0.9, 0.1, 0.0}'), (102, 'FH-102', '{0.8, 0.3, 0.1}'),
 (103, 'FH-103', '{0.2, 0.9, 0.0}'), (104, 'FH-104', '{1.0, 0.0, 0.2}'),
 (201, 'FH-201', '{0.0, 0.1, 1.0}');
INSERT INTO profs SELECT 'vectors', affinity.item_profiles(sku, v) FROM lamp_vectors;
INSERT INTO profs SELECT 'vectors_text', affinity.item_profiles(code, v, '{"normalization": "none"}') FROM lamp_vectors;
SELECT name, affinity.describe(p)->'profile' AS profile FROM profs WHERE name LIKE 'vectors%' ORDER BY name;
SELECT item_id, round(similarity::numeric, 4) AS similarity, rank
  FROM profs, affinity.items_like(p, 104::bigint, 3) WHERE name = 'vectors';
SELECT item_id, round(similarity::numeric, 4) AS similarity, rank
  FROM profs, affinity.items_like(p, 'FH-104', 2, ARRAY['FH-103', 'FH-201']) WHERE name = 'vectors_text';

-- this should fail: other serving functions refuse a profiles value
SELECT * FROM profs, affinity.top_items(p, 1::bigint) WHERE name = 'words';
SELECT * FROM profs, affinity.top_items(p, ARRAY[101]::bigint[]) WHERE name = 'words';
SELECT affinity.score(p, 1::bigint, 101::bigint) FROM profs WHERE name = 'words';
SELECT * FROM profs, affinity.top_items_for_all(p) WHERE name = 'words';
SELECT * FROM profs, affinity.reasons(p, 1::bigint, 101::bigint) WHERE name = 'words';
SELECT affinity.forget_user(p, 1::bigint) FROM profs WHERE name = 'words';
SELECT affinity.ranking_metrics(p, 1::bigint, 101::bigint) FROM profs WHERE name = 'words';
SELECT * FROM profs, affinity.items_like(p, 'FH-101') WHERE name = 'words';

-- this should fail: empty input, NULLs, bad values, bad options
SELECT affinity.item_profiles(sku, feature, value) FROM lamp_features WHERE false;
SELECT affinity.item_profiles(i, f, v) FROM (VALUES (1::bigint, 'a', 0::real)) t(i, f, v);
SELECT affinity.item_profiles(i, f, v) FROM (VALUES (1::bigint, NULL::text, 1::real)) t(i, f, v);
SELECT affinity.item_profiles(i, f, v) FROM (VALUES (NULL::bigint, 'a', 1::real)) t(i, f, v);
SELECT affinity.item_profiles(i, f, v) FROM (VALUES (1::bigint, 'a', NULL::real)) t(i, f, v);
SELECT affinity.item_profiles(i, f, v) FROM (VALUES ('FH-1', 'a', 'NaN'::real)) t(i, f, v);
SELECT affinity.item_profiles(i, f, v) FROM (VALUES (1::bigint, 'a', 'Infinity'::real)) t(i, f, v);
SELECT affinity.item_profiles(i, f, v) FROM (VALUES (1::bigint, '', 1::real)) t(i, f, v);
SELECT affinity.item_profiles(i, f, v) FROM (VALUES (1::bigint, 'a', 3e38::real), (1, 'a', 3e38)) t(i, f, v);
SELECT affinity.item_profiles(sku, feature, value, '{"normalization": "bm25"}') FROM lamp_features;
SELECT affinity.item_profiles(sku, feature, value, '{"min_document_frequency": 0}') FROM lamp_features;
SELECT affinity.item_profiles(sku, feature, value, '{"min_document_frequency": 100}') FROM lamp_features;
SELECT affinity.item_profiles(sku, feature, value, '{"factors": 8}') FROM lamp_features;
SELECT affinity.item_profiles(sku, feature, value, '{"colour": "red"}') FROM lamp_features;
SELECT affinity.item_profiles(sku, feature, value, '[1]') FROM lamp_features;
SELECT affinity.item_profiles(sku, v) FROM (VALUES (1::bigint, '{1, 2}'::real[]), (2, '{1, 2, 3}')) t(sku, v);
SELECT affinity.item_profiles(sku, v) FROM (VALUES (1::bigint, '{1, 2}'::real[]), (1, '{2, 1}')) t(sku, v);
SELECT affinity.item_profiles(sku, v) FROM (VALUES ('FH-7', '{1, 2}'::real[]), ('FH-7', '{2, 1}')) t(sku, v);
SELECT affinity.item_profiles(sku, v) FROM (VALUES (1::bigint, '{1, NaN}'::real[])) t(sku, v);
SELECT affinity.item_profiles(sku, v) FROM (VALUES (1::bigint, '{1, NULL}'::real[])) t(sku, v);
SELECT affinity.item_profiles(sku, v) FROM (VALUES (1::bigint, '{}'::real[])) t(sku, v);
SELECT affinity.item_profiles(sku, v) FROM (VALUES (1::bigint, '{{1, 2}, {3, 4}}'::real[])) t(sku, v);
SELECT affinity.item_profiles(sku, v) FROM (VALUES (1::bigint, NULL::real[])) t(sku, v);
SELECT affinity.item_profiles(sku, v, '{"normalization": "tfidf"}') FROM (VALUES (1::bigint, '{1, 2}'::real[])) t(sku, v);
SELECT affinity.item_profiles(sku, v, '{"min_document_frequency": 2}') FROM (VALUES (1::bigint, '{1, 2}'::real[])) t(sku, v);

-- the memory limit holds for profiles too
SET affinity.max_fit_memory = '1MB';
SELECT affinity.item_profiles(g, 'w' || (g % 5000), 1) FROM generate_series(1, 100000) g;
RESET affinity.max_fit_memory;

DROP TABLE profs, lamp_features, lamp_vectors, lamp_catalogue;
