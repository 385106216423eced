/*
 * interactions.c
 *		Sort the collected rows, sum duplicates, apply the minimum-interaction
 *		filters and build the two CSR views the solvers need.
 *
 * The rows array is sorted in place (it is the aggregate's own state and is
 * not needed afterwards).  Filtering is a single pass: a user or item is
 * dropped when it has fewer distinct partners than its minimum in the full
 * input; users and items left with no interaction are dropped too.
 *
 * Every pass is O(n) per radix byte or per element, whatever the keys: the
 * sorts are radix sorts, and the table that maps item keys to indices
 * hashes with SipHash-1-3 under a key drawn for each build, so item ids
 * cannot be chosen to pile up in its slots.  Each pass calls the caller's
 * poll function every POLL_EVERY elements, so a cancel stops the build
 * within milliseconds (AFF_ERR_CANCELLED).
 */
#include "interactions.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "text_key.h"

/* Item ids spanning at most this many values per item are indexed by offset. */
#define DENSE_SPAN_PER_ITEM 4

/* Elements between two polls: about a millisecond of the slowest pass. */
#define POLL_EVERY		((int64_t) 1 << 16)

/* True when the caller asks to stop; checked at every POLL_EVERY-th element. */
static inline int
stop_at(const AffBuildParams *p, int64_t i)
{
	return (i & (POLL_EVERY - 1)) == 0 && p->poll != NULL && p->poll(p->poll_arg);
}

static AffStatus
cancelled(AffError *err)
{
	return aff_fail(err, AFF_ERR_CANCELLED, "the interaction matrix build was cancelled");
}

static AffStatus
no_memory(AffError *err)
{
	return aff_fail(err, AFF_ERR_NOMEM, "out of memory building the interaction matrix");
}

/* Index of key in the ascending array keys[0..n), or -1. */
int64_t
aff_find_key(const int64_t *keys, int64_t n, int64_t key)
{
	int64_t		lo = 0;
	int64_t		hi = n;

	while (lo < hi)
	{
		int64_t		mid = lo + (hi - lo) / 2;

		if (keys[mid] < key)
			lo = mid + 1;
		else
			hi = mid;
	}
	return (lo < n && keys[lo] == key) ? lo : -1;
}

/*
 * An open-addressing table from key to index into a sorted key array, so
 * that mapping every row's item to its index costs O(1) instead of a
 * binary search with a cache miss per step.  Slots come from a keyed hash
 * (SipHash-1-3 under the build's random key): with an unkeyed mix, ids
 * chosen to share a slot made the build quadratic.
 */
typedef struct KeyIndex
{
	int64_t    *slot_key;
	int32_t    *slot_idx;		/* -1: empty */
	uint64_t	mask;
	uint64_t	key[2];
} KeyIndex;

static inline uint64_t
key_slot(const KeyIndex *ki, int64_t key)
{
	return aff_siphash13_u64(ki->key, (uint64_t) key) & ki->mask;
}

/* Build the table for keys[0..n). */
static AffStatus
key_index_build(KeyIndex *ki, const int64_t *keys, int64_t n,
				const AffBuildParams *p, const AffAllocator *a, AffError *err)
{
	uint64_t	size = 16;
	int64_t		i;

	while (size < (uint64_t) n * 2)
		size <<= 1;
	ki->mask = size - 1;
	ki->key[0] = p->index_key[0];
	ki->key[1] = p->index_key[1];
	ki->slot_key = aff_alloc_array(a, size, sizeof(int64_t));
	ki->slot_idx = aff_alloc_array(a, size, sizeof(int32_t));
	if (!ki->slot_key || !ki->slot_idx)
		return no_memory(err);
	memset(ki->slot_idx, 0xff, sizeof(int32_t) * size);
	for (i = 0; i < n; i++)
	{
		uint64_t	s = key_slot(ki, keys[i]);

		if (stop_at(p, i))
			return cancelled(err);
		while (ki->slot_idx[s] >= 0)
			s = (s + 1) & ki->mask;
		ki->slot_key[s] = keys[i];
		ki->slot_idx[s] = (int32_t) i;
	}
	return AFF_OK;
}

/* Index of key (which must be in the table). */
static inline int32_t
key_index_find(const KeyIndex *ki, int64_t key)
{
	uint64_t	s = key_slot(ki, key);

	while (ki->slot_idx[s] < 0 || ki->slot_key[s] != key)
		s = (s + 1) & ki->mask;
	return ki->slot_idx[s];
}

static void
key_index_free(KeyIndex *ki, const AffAllocator *a)
{
	aff_release(a, ki->slot_key);
	aff_release(a, ki->slot_idx);
}

/*
 * Byte b (0 = lowest) of the sort key of a row at pass `pass`: passes 0-3
 * are the weight's bits (non-negative floats order like their bit
 * patterns), 4-11 the item, 12-19 the user; signed keys get their sign bit
 * flipped so that they order as unsigned numbers.
 */
static inline unsigned
triple_byte(const AffTriple *t, int pass)
{
	uint64_t	k;
	uint32_t	w;

	if (pass < 4)
	{
		memcpy(&w, &t->weight, 4);
		return (w >> (8 * pass)) & 0xff;
	}
	k = (uint64_t) (pass < 12 ? t->item : t->user) ^ 0x8000000000000000ULL;
	return (unsigned) (k >> (8 * ((pass - 4) % 8))) & 0xff;
}

/* Byte `pass` of an int64 key, ordered as signed. */
static inline unsigned
int64_byte(const int64_t *k, int pass)
{
	return (unsigned) ((((uint64_t) *k) ^ 0x8000000000000000ULL) >> (8 * pass)) & 0xff;
}

/*
 * One LSD radix sort body for both element types: passes FIRST..PASSES-1
 * over n elements of TYPE, BYTE(element pointer, pass) giving the pass's
 * byte, with tmp (n more elements) as the second buffer.  LIVE(data, n, p)
 * first finds the passes whose byte is not the same for every element (a
 * bit each; UINT32_MAX when the poll asks to stop): only those are counted
 * and run, so ids that fit in a few bytes cost a few passes.  Their
 * histograms are counted in one read of the data (a byte's histogram does
 * not depend on the order).
 * Stable and O(n) per pass.  The enclosing function returns 1 when the
 * poll asks to stop (the data is then left unsorted).  count: PASSES * 256
 * entries of scratch.
 */
#define RADIX_SORT_BODY(TYPE, FIRST, PASSES, BYTE, LIVE, count) \
	do { \
		TYPE	   *src = data; \
		TYPE	   *dst = tmp; \
		int			pass; \
		int			live[PASSES]; \
		int			n_live = 0; \
		int64_t		i; \
		uint32_t	mask; \
		if (n == 0) \
			return 0; \
		mask = LIVE(src, n, p); \
		if (mask == UINT32_MAX) \
			return 1; \
		for (pass = (FIRST); pass < (PASSES); pass++) \
			if (mask & (1u << pass)) \
				live[n_live++] = pass; \
		memset(count, 0, sizeof(int64_t) * 256 * (PASSES)); \
		for (i = 0; i < n; i++) \
		{ \
			int			l; \
			if (stop_at(p, i)) \
				return 1; \
			for (l = 0; l < n_live; l++) \
				count[live[l] * 256 + BYTE(&src[i], live[l])]++; \
		} \
		for (pass = (FIRST); pass < (PASSES); pass++) \
		{ \
			int64_t    *cnt = count + pass * 256; \
			int64_t		at = 0; \
			int			b; \
			TYPE	   *t; \
			if (!(mask & (1u << pass)) || cnt[BYTE(&src[0], pass)] == n) \
				continue; \
			for (b = 0; b < 256; b++) \
			{ \
				int64_t		c = cnt[b]; \
				cnt[b] = at; \
				at += c; \
			} \
			for (i = 0; i < n; i++) \
			{ \
				if (stop_at(p, i)) \
					return 1; \
				dst[cnt[BYTE(&src[i], pass)]++] = src[i]; \
			} \
			t = src; \
			src = dst; \
			dst = t; \
		} \
		if (src != data) \
			memcpy(data, src, sizeof(TYPE) * (size_t) n); \
		return 0; \
	} while (0)

/*
 * The passes of triple_byte whose byte varies among the rows: the bytes
 * where some user (item) differs from the first row's.
 */
static uint32_t
triple_live(const AffTriple *t, int64_t n, const AffBuildParams *p)
{
	uint64_t	du = 0;
	uint64_t	di = 0;
	uint32_t	mask = 0;
	int64_t		i;
	int			b;

	for (i = 0; i < n; i++)
	{
		if (stop_at(p, i))
			return UINT32_MAX;
		du |= (uint64_t) (t[i].user ^ t[0].user);
		di |= (uint64_t) (t[i].item ^ t[0].item);
	}
	for (b = 0; b < 8; b++)
	{
		if ((di >> (8 * b)) & 0xff)
			mask |= 1u << (4 + b);
		if ((du >> (8 * b)) & 0xff)
			mask |= 1u << (12 + b);
	}
	return mask;
}

/* The same for int64 keys (int64_byte). */
static uint32_t
int64_live(const int64_t *k, int64_t n, const AffBuildParams *p)
{
	uint64_t	d = 0;
	uint32_t	mask = 0;
	int64_t		i;
	int			b;

	for (i = 0; i < n; i++)
	{
		if (stop_at(p, i))
			return UINT32_MAX;
		d |= (uint64_t) (k[i] ^ k[0]);
	}
	for (b = 0; b < 8; b++)
		if ((d >> (8 * b)) & 0xff)
			mask |= 1u << b;
	return mask;
}

/* Weight bits of a row: non-negative floats order like their bit patterns. */
static inline uint32_t
weight_bits(const AffTriple *t)
{
	uint32_t	w;

	memcpy(&w, &t->weight, 4);
	return w;
}

static int
cmp_weight_bits(const void *a, const void *b)
{
	uint32_t	x = weight_bits(a);
	uint32_t	y = weight_bits(b);

	return x < y ? -1 : x > y;
}

/*
 * Rows by (user, item, weight); it replaces a comparison sort on the fit's
 * hot path.  The radix passes order by (user, item) (passes 4-19); the rows
 * of one pair, rare, are then ordered by weight where they lie (insertion
 * for a few, qsort for a long run: equal weight bits are equal rows), the
 * same order the weight's own radix passes would give.
 */
static int
radix_sort_user_item(AffTriple *data, AffTriple *tmp, int64_t n, const AffBuildParams *p)
{
	int64_t		count[20 * 256];

	RADIX_SORT_BODY(AffTriple, 4, 20, triple_byte, triple_live, count);
}

static int
radix_sort_triples(AffTriple *data, AffTriple *tmp, int64_t n, const AffBuildParams *p)
{
	int64_t		start = 0;

	if (radix_sort_user_item(data, tmp, n, p))
		return 1;
	while (start < n)
	{
		int64_t		end = start + 1;

		if (stop_at(p, start))
			return 1;
		while (end < n && data[end].user == data[start].user &&
			   data[end].item == data[start].item)
			end++;
		if (end - start > 16)
			qsort(data + start, (size_t) (end - start), sizeof(AffTriple), cmp_weight_bits);
		else if (end - start > 1)
		{
			int64_t		a;

			for (a = start + 1; a < end; a++)
			{
				AffTriple	t = data[a];
				int64_t		b = a;

				while (b > start && weight_bits(&data[b - 1]) > weight_bits(&t))
				{
					data[b] = data[b - 1];
					b--;
				}
				data[b] = t;
			}
		}
		start = end;
	}
	return 0;
}

/* int64 keys, ascending. */
static int
radix_sort_int64(int64_t *data, int64_t *tmp, int64_t n, const AffBuildParams *p)
{
	int64_t		count[8 * 256];

	RADIX_SORT_BODY(int64_t, 0, 8, int64_byte, int64_live, count);
}

/*
 * Sort rows by (user, item) and sum duplicates; *out gets the distinct
 * count.  Duplicates are ordered by weight so they are summed in a fixed
 * order.  Scratch for n rows comes from the allocator.
 */
static AffStatus
merge_duplicates(AffTriple *rows, int64_t n, int64_t *out, const AffBuildParams *p,
				 const AffAllocator *a, AffError *err)
{
	AffTriple  *tmp;
	int64_t		kept = 0;
	int64_t		i;

	*out = 0;
	if (n == 0)
		return AFF_OK;
	tmp = aff_alloc_array(a, (size_t) n, sizeof(AffTriple));
	if (tmp == NULL)
		return no_memory(err);
	i = radix_sort_triples(rows, tmp, n, p);
	aff_release(a, tmp);
	if (i != 0)
		return cancelled(err);
	for (i = 0; i < n; i++)
	{
		if (stop_at(p, i))
			return cancelled(err);
		if (kept > 0 && rows[kept - 1].user == rows[i].user &&
			rows[kept - 1].item == rows[i].item)
			rows[kept - 1].weight += rows[i].weight;
		else
			rows[kept++] = rows[i];
	}
	*out = kept;
	return AFF_OK;
}

/*
 * Count, for each distinct item, its distinct users; items[] receives the
 * sorted distinct item keys and counts[] their counts, *n_items their
 * number.  items and counts must hold n entries.
 */
static AffStatus
count_items(const AffTriple *rows, int64_t n, int64_t *items, int64_t *counts,
			int64_t *n_items, const AffBuildParams *p, AffError *err)
{
	int64_t		k = 0;
	int64_t		i;

	for (i = 0; i < n; i++)
		items[i] = rows[i].item;
	/* counts is free until the loop below: use it as the radix scratch */
	if (n > 0 && radix_sort_int64(items, counts, n, p) != 0)
		return cancelled(err);
	for (i = 0; i < n; i++)
	{
		if (stop_at(p, i))
			return cancelled(err);
		if (k > 0 && items[k - 1] == items[i])
			counts[k - 1]++;
		else
		{
			items[k] = items[i];
			counts[k] = 1;
			k++;
		}
	}
	*n_items = k;
	return AFF_OK;
}

/*
 * Drop rows of users and items below their minimum partner counts (a single
 * pass over the counts of the full input).  Compacts rows in place; *kept
 * gets the number kept.
 */
static AffStatus
apply_minimums(AffTriple *rows, int64_t n, const int64_t *items,
			   const int64_t *counts, int64_t n_items, int64_t *kept,
			   const AffBuildParams *p, AffMatrix *m, AffError *err)
{
	int			min_user = p->min_user;
	int			min_item = p->min_item;
	int64_t		out = 0;
	int64_t		start = 0;
	int64_t		next_poll = 0;
	int64_t		i;

	for (i = 0; i < n_items; i++)
		if (counts[i] < min_item)
			m->dropped_items++;

	while (start < n)
	{
		int64_t		end = start;

		if (start >= next_poll)
		{
			if (p->poll != NULL && p->poll(p->poll_arg))
				return cancelled(err);
			next_poll = start + POLL_EVERY;
		}
		while (end < n && rows[end].user == rows[start].user)
			end++;
		if (end - start < min_user)
		{
			m->dropped_users++;
			m->dropped_interactions += end - start;
		}
		else if (min_item <= 1)
		{
			/* every item has at least one partner: keep the whole row range */
			memmove(&rows[out], &rows[start], sizeof(AffTriple) * (size_t) (end - start));
			out += end - start;
		}
		else
		{
			for (i = start; i < end; i++)
			{
				int64_t		k = aff_find_key(items, n_items, rows[i].item);

				if (counts[k] < min_item)
					m->dropped_interactions++;
				else
					rows[out++] = rows[i];
			}
		}
		start = end;
	}
	*kept = out;
	return AFF_OK;
}

/* Fill the by-item CSR as the transpose of the by-user CSR (counting sort). */
static AffStatus
transpose(AffMatrix *m, const AffBuildParams *p, AffError *err)
{
	int64_t		u;
	int64_t		j;
	int64_t		next_poll = 0;

	memset(m->col_ptr, 0, sizeof(int64_t) * (size_t) (m->n_items + 1));
	for (j = 0; j < m->nnz; j++)
	{
		if (stop_at(p, j))
			return cancelled(err);
		m->col_ptr[m->row_idx[j] + 1]++;
	}
	for (j = 0; j < m->n_items; j++)
		m->col_ptr[j + 1] += m->col_ptr[j];
	/* row_ptr-ordered scan keeps user indices ascending within each column */
	for (u = 0; u < m->n_users; u++)
	{
		if (m->row_ptr[u] >= next_poll)
		{
			if (p->poll != NULL && p->poll(p->poll_arg))
				return cancelled(err);
			next_poll = m->row_ptr[u] + POLL_EVERY;
		}
		for (j = m->row_ptr[u]; j < m->row_ptr[u + 1]; j++)
		{
			int32_t		i = m->row_idx[j];
			int64_t		pos = m->col_ptr[i]++;

			m->col_idx[pos] = (int32_t) u;
			m->col_val[pos] = m->row_val[j];
		}
	}
	for (j = m->n_items; j > 0; j--)
		m->col_ptr[j] = m->col_ptr[j - 1];
	m->col_ptr[0] = 0;
	return AFF_OK;
}

static AffStatus
alloc_matrix(const AffAllocator *a, AffMatrix *m, AffError *err)
{
	m->user_keys = aff_alloc_array(a, (size_t) m->n_users, sizeof(int64_t));
	m->item_keys = aff_alloc_array(a, (size_t) m->n_items, sizeof(int64_t));
	m->row_ptr = aff_alloc_array(a, (size_t) m->n_users + 1, sizeof(int64_t));
	m->row_idx = aff_alloc_array(a, (size_t) m->nnz, sizeof(int32_t));
	m->row_val = aff_alloc_array(a, (size_t) m->nnz, sizeof(float));
	m->col_ptr = aff_alloc_array(a, (size_t) m->n_items + 1, sizeof(int64_t));
	m->col_idx = aff_alloc_array(a, (size_t) m->nnz, sizeof(int32_t));
	m->col_val = aff_alloc_array(a, (size_t) m->nnz, sizeof(float));
	if (!m->user_keys || !m->item_keys || !m->row_ptr || !m->row_idx ||
		!m->row_val || !m->col_ptr || !m->col_idx || !m->col_val)
		return no_memory(err);
	return AFF_OK;
}

/* Summed weights must stay finite. */
static AffStatus
check_sums(const AffTriple *rows, int64_t n, const AffBuildParams *p, AffError *err)
{
	int64_t		i;

	for (i = 0; i < n; i++)
	{
		if (stop_at(p, i))
			return cancelled(err);
		if (!isfinite(rows[i].weight))
		{
			aff_fail(err, AFF_ERR_INVALID, "summed weight is out of range");
			return aff_detail(err, "The weights of user %lld and item %lld add up to more than a real can hold.",
							  (long long) rows[i].user, (long long) rows[i].item);
		}
	}
	return AFF_OK;
}

/*
 * Filter: drop users and items under their minimums; *n becomes the rows
 * kept.  An input left empty is AFF_ERR_INVALID.
 */
static AffStatus
filter_rows(AffTriple *rows, int64_t *n, const AffBuildParams *p,
			const AffAllocator *a, AffMatrix *m, AffError *err)
{
	/* with min_item_interactions 1 no item is under its minimum: no counts needed */
	int			need_counts = p->min_item > 1;
	int64_t    *items = need_counts ? aff_alloc_array(a, (size_t) *n, sizeof(int64_t)) : NULL;
	int64_t    *counts = need_counts ? aff_alloc_array(a, (size_t) *n, sizeof(int64_t)) : NULL;
	int64_t		n_items = 0;
	AffStatus	st = AFF_OK;

	if (need_counts && (!items || !counts))
		st = no_memory(err);
	else if (need_counts)
		st = count_items(rows, *n, items, counts, &n_items, p, err);
	if (st == AFF_OK)
		st = apply_minimums(rows, *n, items, counts, n_items, n, p, m, err);
	aff_release(a, counts);
	aff_release(a, items);
	if (st == AFF_OK && *n == 0)
	{
		aff_fail(err, AFF_ERR_INVALID,
				 "no interactions are left after the minimum-interaction filters");
		return aff_detail(err, "min_user_interactions is %d and min_item_interactions is %d; %lld users and %lld items were dropped.",
						  p->min_user, p->min_item, (long long) m->dropped_users,
						  (long long) m->dropped_items);
	}
	return st;
}

/*
 * The distinct item keys of the kept rows, ascending, into *items (an
 * allocation of n keys, the first m->n_items used).
 */
static AffStatus
distinct_items(const AffTriple *rows, int64_t n, int64_t **items,
			   const AffBuildParams *p, const AffAllocator *a, AffMatrix *m,
			   AffError *err)
{
	int64_t    *k = aff_alloc_array(a, (size_t) n, sizeof(int64_t));
	int64_t    *tmp = aff_alloc_array(a, (size_t) n, sizeof(int64_t));
	int64_t		i;
	int			stopped;

	*items = k;
	if (!k || !tmp)
	{
		aff_release(a, tmp);
		return no_memory(err);
	}
	for (i = 0; i < n; i++)
		k[i] = rows[i].item;
	stopped = radix_sort_int64(k, tmp, n, p);
	aff_release(a, tmp);
	if (stopped)
		return cancelled(err);
	m->n_items = 0;
	for (i = 0; i < n; i++)
		if (i == 0 || k[i] != k[i - 1])
			k[m->n_items++] = k[i];
	return AFF_OK;
}

/* Fill keys, the by-user CSR (items through the index) and its transpose. */
static AffStatus
fill_matrix(const AffTriple *rows, int64_t n, const int64_t *items,
			const AffBuildParams *p, const AffAllocator *a, AffMatrix *m,
			AffError *err)
{
	KeyIndex	ki = {NULL, NULL, 0, {0, 0}};
	AffStatus	st;
	int64_t		i;
	int64_t		u = -1;

	int32_t    *dense = NULL;
	uint64_t	span = m->n_items > 0 ? (uint64_t) items[m->n_items - 1] - (uint64_t) items[0] : 0;

	st = alloc_matrix(a, m, err);
	/*
	 * Item ids in a narrow range (as ids from a sequence are): index by the
	 * id's offset in a plain array instead of hashing every row's id; the
	 * range is bounded by the item count, so no id can make it large.
	 */
	if (st == AFF_OK && span < (uint64_t) DENSE_SPAN_PER_ITEM * (uint64_t) m->n_items)
	{
		dense = aff_alloc_array(a, (size_t) span + 1, sizeof(int32_t));
		if (dense != NULL)
			for (i = 0; i < m->n_items; i++)
				dense[(uint64_t) items[i] - (uint64_t) items[0]] = (int32_t) i;
	}
	if (st == AFF_OK && dense == NULL)
		st = key_index_build(&ki, items, m->n_items, p, a, err);
	if (st == AFF_OK)
	{
		memcpy(m->item_keys, items, sizeof(int64_t) * (size_t) m->n_items);
		for (i = 0; i < n; i++)
		{
			if (stop_at(p, i))
			{
				st = cancelled(err);
				break;
			}
			if (i == 0 || rows[i].user != rows[i - 1].user)
			{
				u++;
				m->user_keys[u] = rows[i].user;
				m->row_ptr[u] = i;
			}
			m->row_idx[i] = dense != NULL ?
				dense[(uint64_t) rows[i].item - (uint64_t) items[0]] :
				key_index_find(&ki, rows[i].item);
			m->row_val[i] = rows[i].weight;
		}
	}
	key_index_free(&ki, a);
	aff_release(a, dense);
	if (st == AFF_OK)
	{
		m->row_ptr[m->n_users] = n;
		st = transpose(m, p, err);
	}
	return st;
}

/*
 * Build m from rows[0..n_rows).  rows is reordered and overwritten.  On
 * success m owns its arrays (free with aff_matrix_free); on failure it owns
 * nothing.  An input that ends up empty after filtering is
 * AFF_ERR_INVALID; a cancel through p->poll is AFF_ERR_CANCELLED.
 */
AffStatus
aff_matrix_build(AffTriple *rows, int64_t n_rows, const AffBuildParams *p,
				 const AffAllocator *a, AffMatrix *m, AffError *err)
{
	int64_t    *items = NULL;
	int64_t		n;
	int64_t		i;
	AffStatus	st;

	memset(m, 0, sizeof(*m));
	st = merge_duplicates(rows, n_rows, &n, p, a, err);
	if (st != AFF_OK)
		return st;
	m->duplicates_summed = n_rows - n;
	if ((st = check_sums(rows, n, p, err)) != AFF_OK ||
		(st = filter_rows(rows, &n, p, a, m, err)) != AFF_OK)
		return st;

	/* distinct users and items of the kept rows */
	m->nnz = n;
	m->n_users = 0;
	for (i = 0; i < n; i++)
		if (i == 0 || rows[i].user != rows[i - 1].user)
			m->n_users++;
	st = distinct_items(rows, n, &items, p, a, m, err);
	if (st == AFF_OK && (m->n_users > AFF_MAX_ENTITIES || m->n_items > AFF_MAX_ENTITIES))
		st = aff_fail(err, AFF_ERR_LIMIT, "too many distinct users or items for one model");
	if (st == AFF_OK)
		st = fill_matrix(rows, n, items, p, a, m, err);
	aff_release(a, items);
	if (st != AFF_OK)
		aff_matrix_free(a, m);
	return st;
}

void
aff_matrix_free(const AffAllocator *a, AffMatrix *m)
{
	aff_release(a, m->user_keys);
	aff_release(a, m->item_keys);
	aff_release(a, m->row_ptr);
	aff_release(a, m->row_idx);
	aff_release(a, m->row_val);
	aff_release(a, m->col_ptr);
	aff_release(a, m->col_idx);
	aff_release(a, m->col_val);
	memset(m, 0, sizeof(*m));
}
