-- Content-based filtering: affinity.fit with item profiles (method content).
-- Each customer's preference vector over the profiles' features is a ridge
-- regression of the customer's purchases on the item profiles, so products
-- nobody has bought yet are ranked from their descriptions.  The shop is
-- the invented Fernhollow General Store; the lanterns are new this week.
SET extra_float_digits = 0;

CREATE TABLE shop_catalogue (sku bigint PRIMARY KEY, category text, price numeric,
							 description text);
INSERT INTO shop_catalogue VALUES
 (101, 'camping', 34.00, 'two person dome tent, green'),
 (102, 'camping', 12.00, 'folding camp stool'),
 (103, 'camping', 22.00, 'camp stove with gas canister'),
 (201, 'coffee', 18.00, 'hand coffee grinder, steel burr'),
 (202, 'coffee', 9.00, 'coffee filter papers, box of 100'),
 (203, 'coffee', 26.00, 'pour-over coffee kettle, steel'),
 (301, 'camping', 29.00, 'battery camp lantern, folding handle'),   -- new: nobody bought it yet
 (302, 'coffee', 14.00, 'steel coffee canister, airtight');          -- new
CREATE TABLE shop_features AS
SELECT sku, 'word:' || w AS feature, 1::real AS value
  FROM shop_catalogue, unnest(tsvector_to_array(to_tsvector('english', description))) AS w
UNION ALL
SELECT sku, 'category:' || category, 1 FROM shop_catalogue
UNION ALL
SELECT sku, 'price:' || CASE WHEN price < 15 THEN 'low' WHEN price < 30 THEN 'mid' ELSE 'high' END, 1
  FROM shop_catalogue;
CREATE TABLE shop_purchases (customer bigint, sku bigint, qty real);
INSERT INTO shop_purchases VALUES
 (1, 101, 1), (1, 102, 2), (1, 103, 1),      -- a hill walker
 (2, 201, 1), (2, 202, 3), (2, 203, 1),      -- a home barista
 (3, 102, 1), (3, 202, 1),
 (4, 999, 2);                                -- a product without a profile: dropped, counted

-- the profiles go in once, as a scalar subquery (an InitPlan)
EXPLAIN (COSTS OFF)
SELECT affinity.fit(customer, sku, qty, '{"method": "content"}',
					(SELECT affinity.item_profiles(sku, feature, value) FROM shop_features))
  FROM shop_purchases;

CREATE TABLE cm AS
SELECT affinity.fit(customer, sku, qty, '{"method": "content", "regularization": 0.5, "alpha": 4}',
					(SELECT affinity.item_profiles(sku, feature, value) FROM shop_features)) AS model
  FROM shop_purchases;
SELECT d->>'method' AS method, d->'users' AS users, d->'items' AS items,
	   d->'interactions' AS interactions, d->'dropped_items' AS dropped_items,
	   d->'dropped_users' AS dropped_users, d->'profile'->'features' AS features,
	   d->'options'->'regularization' AS regularization
  FROM cm, affinity.describe(model) d;

-- the new lantern and canister are ranked for the customers whose tastes they share
SELECT r.rank, r.item_id, c.description, round(r.score::numeric, 3) AS score, r.source
  FROM cm, affinity.top_items(cm.model, 1::bigint, 3) r JOIN shop_catalogue c ON c.sku = r.item_id
 ORDER BY r.rank;
SELECT r.rank, r.item_id, c.description, round(r.score::numeric, 3) AS score
  FROM cm, affinity.top_items(cm.model, 2::bigint, 3) r JOIN shop_catalogue c ON c.sku = r.item_id
 ORDER BY r.rank;
-- candidates and exclusions
SELECT r.rank, r.item_id FROM cm,
	   affinity.top_items(cm.model, 1::bigint, 5, exclude_seen => false,
						  exclude => ARRAY[101]::bigint[], candidates => ARRAY[101, 102, 301, 302]::bigint[]) r
 ORDER BY r.rank;
-- a guest's cart: the same regression on the cart
SELECT r.rank, r.item_id, round(r.score::numeric, 3) AS score, r.source
  FROM cm, affinity.top_items(cm.model, ARRAY[203]::bigint[], 3) r ORDER BY r.rank;
-- score, reasons (which of the customer's purchases drive the score)
SELECT round(affinity.score(model, 1::bigint, 301::bigint)::numeric, 3) AS lantern_for_walker,
	   round(affinity.score(model, 2::bigint, 301::bigint)::numeric, 3) AS lantern_for_barista
  FROM cm;
SELECT r.rank, r.past_item_id, round(r.contribution::numeric, 3) AS contribution
  FROM cm, affinity.reasons(cm.model, 1::bigint, 301::bigint) r ORDER BY r.rank;
-- feature_reasons: which of the lantern's features make up the walker's
-- score of it, largest first; all of them add up to the score
SELECT r.rank, r.feature, round(r.contribution::numeric, 3) AS contribution
  FROM cm, affinity.feature_reasons(cm.model, 1::bigint, 301::bigint, 3) r ORDER BY r.rank;
SELECT f.n AS features, abs(f.total - affinity.score(cm.model, 1::bigint, 301::bigint)) < 1e-6 AS adds_up
  FROM cm, LATERAL (SELECT count(*) AS n, sum(r.contribution) AS total
					  FROM affinity.feature_reasons(cm.model, 1::bigint, 301::bigint, 100) r) f;
-- and it is the product of the item's profile and the user's vector, feature by feature
SELECT count(*) AS dims,
	   max(abs(r.contribution - uv.x[d] * iv.q[d])) < 1e-6 AS products
  FROM (SELECT affinity.fit(u, i, 1, '{"method": "content"}',
						   (SELECT affinity.item_profiles(i, ARRAY[i, 3 - i, 1]::real[], '{"normalization": "none"}')
							  FROM generate_series(1, 4) i)) AS m
		  FROM (VALUES (1::bigint, 1::bigint), (1, 2), (2, 4)) v(u, i)) dm,
	   LATERAL (SELECT affinity.user_vector(dm.m, 1::bigint) AS x) uv,
	   LATERAL (SELECT ARRAY[3, 0, 1]::real[] AS q) iv,
	   affinity.feature_reasons(dm.m, 1::bigint, 3::bigint, 10) r,
	   LATERAL (SELECT substr(r.feature, 11)::int AS d) dd(d);
SELECT * FROM cm, affinity.feature_reasons(cm.model, 1::bigint, 301::bigint, -1);
SELECT count(*) FROM cm, affinity.feature_reasons(cm.model, 77::bigint, 301::bigint);
SELECT * FROM (SELECT affinity.fit(customer, sku, qty, '{"method": "popularity"}') AS model FROM shop_purchases) p,
	   affinity.feature_reasons(p.model, 1::bigint, 101::bigint);
-- items like the new lantern: content cosine
SELECT r.rank, r.item_id, round(r.similarity::numeric, 3) AS similarity
  FROM cm, affinity.items_like(cm.model, 301::bigint, 3) r ORDER BY r.rank;
-- the batch agrees with top_items
SELECT count(*) AS disagreements FROM cm, affinity.top_items_for_all(cm.model, 3) b
  LEFT JOIN LATERAL affinity.top_items(cm.model, b.user_id, 3) t ON t.rank = b.rank
 WHERE t.item_id IS DISTINCT FROM b.item_id;
-- ranking metrics on a held-out purchase of a new product
SELECT affinity.ranking_metrics(m.model, h.customer, h.sku, 2) AS metrics
  FROM cm m, (VALUES (1::bigint, 301::bigint), (2, 302)) h(customer, sku);
-- the preference vector has one value per feature
SELECT array_length(affinity.user_vector(model, 1::bigint), 1) = (affinity.describe(model)->'profile'->>'features')::int AS one_per_feature
  FROM cm;
-- a value round-trips through its text form
SELECT affinity.describe(model::text::affinity.model)->>'fingerprint' = affinity.describe(model)->>'fingerprint' AS same
  FROM cm;
-- forget_user cuts the customer's preference vector and purchases
SELECT d->'users' AS users, d->'interactions' AS interactions,
	   (SELECT array_agg(item_id ORDER BY rank) FROM affinity.top_items(f.m, 2::bigint, 3)) =
	   (SELECT array_agg(item_id ORDER BY rank) FROM affinity.top_items(cm.model, 2::bigint, 3)) AS others_unchanged
  FROM cm, (SELECT affinity.forget_user(model, 1::bigint) AS m FROM cm) f, affinity.describe(f.m) d;

-- errors
-- NULL profiles (a subquery that finds no row)
SELECT affinity.fit(customer, sku, qty, '{"method": "content"}', (SELECT model FROM cm WHERE false))
  FROM shop_purchases;
-- profiles that are not profiles
SELECT affinity.fit(customer, sku, qty, '{"method": "content"}', (SELECT model FROM cm))
  FROM shop_purchases;
-- empty profiles: the profiles aggregate refuses to build one
SELECT affinity.fit(customer, sku, qty, '{"method": "content"}',
					(SELECT affinity.item_profiles(sku, feature, value) FROM shop_features WHERE false))
  FROM shop_purchases;
-- item keys of another type
SELECT affinity.fit(customer, sku::text, qty, '{"method": "content"}',
					(SELECT affinity.item_profiles(sku, feature, value) FROM shop_features))
  FROM shop_purchases;
-- profiles with another method, and content without profiles
SELECT affinity.fit(customer, sku, qty, '{"method": "ease"}',
					(SELECT affinity.item_profiles(sku, feature, value) FROM shop_features))
  FROM shop_purchases;
SELECT affinity.fit(customer, sku, qty, '{"method": "content"}') FROM shop_purchases;
-- profiles sharing no item with the purchases
SELECT affinity.fit(customer, sku + 5000, qty, '{"method": "content"}',
					(SELECT affinity.item_profiles(sku, feature, value) FROM shop_features))
  FROM shop_purchases;
-- a fit over affinity.max_fit_memory is refused, naming its figures
SET affinity.max_fit_memory = 1;
SELECT affinity.fit(customer, sku, qty, '{"method": "content"}',
					(SELECT affinity.item_profiles(sku || '', 'f' || g, 1) FROM shop_catalogue, generate_series(1, 600) g))
  FROM (SELECT customer, sku::text AS sku, qty FROM shop_purchases) p;
RESET affinity.max_fit_memory;
-- item_profiles cannot be chosen as a fit's method
SELECT affinity.fit(customer, sku, qty, '{"method": "item_profiles"}') FROM shop_purchases;
