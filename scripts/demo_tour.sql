-- scripts/demo_tour.sql: the queries of the affinity demo, run by scripts/demo with psql on a
-- database that holds the extension and the invented data of scripts/demo_data.sql.

\set ON_ERROR_STOP on
\pset footer off
\pset null '-'
SET client_min_messages = warning;

\echo '== 1. Fernhollow General Store: the purchase history we loaded =='
SELECT (SELECT count(*) FROM demo.products) AS products,
	   (SELECT count(DISTINCT category) FROM demo.products) AS categories,
	   (SELECT count(*) FROM demo.customers) AS customers,
	   count(*) AS purchase_lines,
	   sum(quantity) AS units,
	   min(bought_at) AS first_day,
	   max(bought_at) AS last_day
FROM demo.purchases;

\echo '== 2. The tastes planted in the data (the model is never told these) =='
SELECT g.segment,
	   m.category AS main_category,
	   s.category AS side_category,
	   (SELECT count(*) FROM demo.customers c
		 WHERE g.segment = ANY (string_to_array(c.segment, ' + '))) AS customers_with_it
FROM demo.segments g
JOIN demo.categories m ON m.category_id = g.main_category
JOIN demo.categories s ON s.category_id = g.side_category
ORDER BY g.segment_id;

\echo '== 3. Fit implicit ALS: one aggregate over (customer, product, quantity) =='
\echo 'CREATE TABLE demo.models AS SELECT affinity.fit(customer_id, product_id, quantity::real,'
\echo '       ''{"factors": 32, "iterations": 15}'') AS model FROM demo.purchases;'
CREATE TABLE demo.models AS
SELECT affinity.fit(customer_id, product_id, quantity::real,
					'{"factors": 32, "iterations": 15}') AS model
FROM demo.purchases;
\echo

\echo '== 4. What the model says about itself: affinity.describe(model) =='
SELECT d ->> 'method' AS method,
	   (d ->> 'users')::bigint AS users,
	   (d ->> 'items')::bigint AS items,
	   (d ->> 'interactions')::bigint AS interactions,
	   jsonb_array_length(d -> 'loss') AS sweeps,
	   round((d -> 'loss' -> 0)::numeric, 4) AS first_loss,
	   round((d -> 'loss' -> -1)::numeric, 4) AS last_loss,
	   round((d ->> 'fit_seconds')::numeric, 2) AS fit_seconds
FROM demo.models, affinity.describe(model) AS d;

-- Three customers with a fair history, from different tastes: two with one segment, one with two.
WITH history AS (
	SELECT c.customer_id, c.segment, count(*) AS n
	FROM demo.customers c JOIN demo.purchases u USING (customer_id)
	GROUP BY 1, 2
	HAVING count(*) >= 12
)
SELECT min(customer_id) FILTER (WHERE segment = 'home baristas') AS first_customer,
	   min(customer_id) FILTER (WHERE segment = 'young families') AS second_customer,
	   min(customer_id) FILTER (WHERE segment = 'hill walkers + pet households') AS third_customer
FROM history \gset

\echo '== 5. Top 5 for three customers (affinity.top_items), next to what they bought =='
\set cust :first_customer
\ir demo_customer.sql
\set cust :second_customer
\ir demo_customer.sql
\set cust :third_customer
\ir demo_customer.sql

\echo '== 6. Look-alikes of one product (affinity.items_like): cosine of the item factors =='
SELECT product_id AS like_id,
	   format('Products closest to %s (%s, id %s):', name, category, product_id) AS heading
FROM demo.products WHERE product_id = 604 \gset
\echo :heading
SELECT r.rank, p.name, p.category, round(r.similarity::numeric, 3) AS similarity
FROM demo.models m,
	 LATERAL affinity.items_like(m.model, :like_id, 8) AS r
JOIN demo.products p ON p.product_id = r.item_id
ORDER BY r.rank;

\echo '== 7. A baseline for comparison: the popularity method ranks best-sellers for everyone =='
CREATE TABLE demo.baseline AS
SELECT affinity.fit(customer_id, product_id, quantity::real, '{"method": "popularity"}') AS model
FROM demo.purchases;
SELECT format('Customer %s (%s), popularity baseline:', customer_id, segment) AS heading
FROM demo.customers WHERE customer_id = :first_customer \gset
\echo :heading
SELECT r.rank, p.name, p.category, r.score,
	   CASE WHEN EXISTS (SELECT 1 FROM demo.customer_tastes t
						 WHERE t.customer_id = :first_customer AND t.category = p.category)
			THEN 'yes' ELSE 'no' END AS fits_taste
FROM demo.baseline b,
	 LATERAL affinity.top_items(b.model, :first_customer::bigint, 5) AS r
JOIN demo.products p ON p.product_id = r.item_id
ORDER BY r.rank;

\echo 'Share of the top 5 that falls in the planted tastes, over all customers:'
WITH models AS (
	SELECT 'implicit_als' AS method, model FROM demo.models
	UNION ALL
	SELECT 'popularity', model FROM demo.baseline
), recs AS (
	SELECT m.method, c.customer_id, p.category
	FROM models m
	CROSS JOIN demo.customers c
	CROSS JOIN LATERAL affinity.top_items(m.model, c.customer_id, 5) AS r
	JOIN demo.products p ON p.product_id = r.item_id
)
SELECT r.method, count(DISTINCT r.customer_id) AS customers, count(*) AS recommendations,
	   round(avg((t.category IS NOT NULL)::int), 3) AS share_fitting_taste
FROM recs r
LEFT JOIN demo.customer_tastes t USING (customer_id, category)
GROUP BY r.method
ORDER BY share_fitting_taste DESC;

-- 8. Held-out check, when the build has affinity.ranking_metrics: fit on January to October,
-- rank for November and December.
SELECT EXISTS (SELECT 1 FROM pg_proc p JOIN pg_namespace n ON n.oid = p.pronamespace
			   WHERE n.nspname = 'affinity' AND p.proname = 'ranking_metrics') AS has_metrics \gset
\if :has_metrics
\echo '== 8. Held out: fit on purchases up to October, rank the top 10 for November-December =='
CREATE TEMP TABLE split_models AS
SELECT o.label,
	   affinity.fit(u.customer_id, u.product_id, u.quantity::real, o.options) AS model
FROM demo.purchases u,
	 (VALUES ('implicit_als', '{"factors": 32, "iterations": 15}'::jsonb),
			 ('popularity', '{"method": "popularity"}'::jsonb)) AS o(label, options)
WHERE u.bought_at < date '2025-11-01'
GROUP BY o.label;
-- Held-out pairs are the products a customer bought for the first time in November-December
-- (products bought before are excluded from the ranking, as top_items does).
WITH later AS (
	SELECT DISTINCT customer_id, product_id
	FROM demo.purchases u
	WHERE u.bought_at >= date '2025-11-01'
	  AND NOT EXISTS (SELECT 1 FROM demo.purchases e
					  WHERE e.customer_id = u.customer_id AND e.product_id = u.product_id
						AND e.bought_at < date '2025-11-01')
)
SELECT s.label AS model,
	   (s.r ->> 'users')::int AS users,
	   round((s.r ->> 'precision')::numeric, 3) AS precision,
	   round((s.r ->> 'recall')::numeric, 3) AS recall,
	   round((s.r ->> 'ndcg')::numeric, 3) AS ndcg,
	   round((s.r ->> 'hit_rate')::numeric, 3) AS hit_rate
FROM (SELECT m.label,
			 affinity.ranking_metrics(m.model, l.customer_id, l.product_id, 10) AS r
	  FROM split_models m, later l
	  GROUP BY m.label) AS s
ORDER BY ndcg DESC;
\endif
\echo

\echo '== 9. New products from day one: three products nobody has bought yet, ranked from their descriptions =='
-- The README's "New products from day one": item profiles from the descriptions (PostgreSQL's
-- text search), categories and price bands, and method content over them.
CREATE TEMP TABLE new_products (product_id bigint PRIMARY KEY, name text, category text,
								price numeric, description text);
INSERT INTO new_products VALUES
 (9001, 'Fernhollow Trail Lantern', 'Camping', 29.00, 'folding battery lantern for tents and trails'),
 (9002, 'Ridge Pour-Over Kettle', 'Kitchen', 34.00, 'gooseneck kettle for pour-over coffee'),
 (9003, 'Valley Seed Tin', 'Garden', 7.50, 'tin of wildflower seeds for borders and pots');
CREATE TEMP TABLE catalogue AS
SELECT product_id, name, category, price, NULL::text AS description FROM demo.products
UNION ALL SELECT product_id, name, category, price, description FROM new_products;
CREATE TEMP TABLE profile_rows AS
SELECT product_id, 'word:' || w AS feature, 1::real AS value
  FROM catalogue, unnest(tsvector_to_array(to_tsvector('english', name || ' ' || coalesce(description, '')))) w
UNION ALL
SELECT product_id, 'category:' || category, 1 FROM catalogue
UNION ALL
SELECT product_id, 'price:' || CASE WHEN price < 10 THEN 'low' WHEN price < 30 THEN 'mid' ELSE 'high' END, 1
  FROM catalogue;
CREATE TEMP TABLE content_model AS
SELECT affinity.fit(customer_id, product_id, quantity::real,
					'{"method": "content", "regularization": 1, "alpha": 10}',
					(SELECT affinity.item_profiles(product_id, feature, value, '{"normalization": "tfidf"}')
					   FROM profile_rows)) AS model
FROM demo.purchases;
\echo 'Who is most likely to want the new lantern (score of product 9001), and why (affinity.feature_reasons):'
SELECT c.customer_id, c.segment, round(affinity.score(m.model, c.customer_id, 9001)::numeric, 3) AS score,
	   (SELECT string_agg(r.feature, ', ' ORDER BY r.rank)
		  FROM affinity.feature_reasons(m.model, c.customer_id, 9001::bigint, 3) r) AS driven_by
  FROM content_model m, demo.customers c
 ORDER BY affinity.score(m.model, c.customer_id, 9001) DESC NULLS LAST, c.customer_id LIMIT 5;
\echo 'Look-alikes of the new kettle from content (it has no sales, so no purchase-based model has any):'
SELECT l.rank, p.name, p.category, round(l.similarity::numeric, 3) AS similarity
  FROM content_model m, affinity.items_like(m.model, 9002::bigint, 5) l
  JOIN catalogue p ON p.product_id = l.item_id ORDER BY l.rank;
\echo 'How many customers get each new product in their top 10 (affinity.top_items_for_all on the content model):'
SELECT p.name, count(*) AS customers
  FROM content_model m, affinity.top_items_for_all(m.model, 10) t
  JOIN new_products p ON p.product_id = t.item_id
 GROUP BY p.name ORDER BY customers DESC;
