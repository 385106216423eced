-- scripts/demo_customer.sql: one customer's page in the affinity demo, included by
-- scripts/demo_tour.sql with the psql variable :cust set to a customer id: what the customer
-- bought, by category, and the model's top 5 of the products they have not bought yet, each
-- marked with whether its category is one that the customer's planted tastes favour.

SELECT format('-- Customer %s (%s), planted taste: %s', customer_id, name, segment) AS heading,
	   format('Recommended, affinity.top_items(model, %s, 5):', customer_id) AS rec_heading
FROM demo.customers WHERE customer_id = :cust \gset
\echo :heading
\echo 'Bought so far, by category:'
SELECT p.category, count(*) AS lines, sum(u.quantity) AS units
FROM demo.purchases u JOIN demo.products p USING (product_id)
WHERE u.customer_id = :cust
GROUP BY p.category
ORDER BY lines DESC, p.category;
\echo :rec_heading
SELECT r.rank, p.name, p.category, round(r.score::numeric, 3) AS score,
	   CASE WHEN EXISTS (SELECT 1 FROM demo.customer_tastes t
						 WHERE t.customer_id = :cust AND t.category = p.category)
			THEN 'yes' ELSE 'no' END AS fits_taste
FROM demo.models m,
	 LATERAL affinity.top_items(m.model, :cust::bigint, 5) AS r
JOIN demo.products p ON p.product_id = r.item_id
ORDER BY r.rank;
