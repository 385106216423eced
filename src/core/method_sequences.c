/*
 * method_sequences.c
 *		sequential_rules as a method: weighted transitions from an item to
 *		the items that follow it in ordered events, with a decay over the
 *		distance, kept as the heaviest successors of each item.
 *
 * The rule (Ludewig and Jannach 2018, "Evaluation of session-based
 * recommendation algorithms", User Modeling and User-Adapted Interaction
 * 28(4-5), section 2.1, "Sequential rules"): for every sequence, every
 * event of item p at step x and every later event of item q != p at step
 * y with 1 <= y - x <= window add 1 / (y - x) to the weight of the rule
 * p -> q.  Events of one step (equal positions) give no rule to each
 * other (sequences.h); an item followed by itself makes no rule, since
 * the rule predicts another item.  The weights are these sums, not
 * divided by anything: dividing the rules of p by a count of p's would
 * change no ranking from one recent item.
 *
 * Serving (basket_scores): the recent items r_1 .. r_m of a session, in
 * order, score item q by sum over j = 1 .. min(m, window) of
 * W(r_(m-j+1), q) / j: the item j steps back weighs 1 / j, the decay the
 * rule itself gives an item j steps before the next one.  The binding
 * passes those weights (summed for an item that recurs) as the basket's
 * weights.  items_like gives the successors of one item.
 */
#include "sequences.h"
#include "method.h"
#include "interactions.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define POLL_EVERY 65536

const char *
aff_position_name(int code)
{
	switch (code)
	{
		case AFF_POSITION_NUMBER:
			return "number";
		case AFF_POSITION_TIMESTAMP:
			return "timestamp";
		case AFF_POSITION_TIMESTAMPTZ:
			return "timestamptz";
	}
	return "unknown";
}

static AffStatus
cancelled(AffError *err)
{
	return aff_fail(err, AFF_ERR_CANCELLED, "building the sequential rules was cancelled");
}

static AffStatus
no_memory(AffError *err)
{
	return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the sequential rules");
}

static int
polled_stop(const AffSeqParams *p, int64_t i)
{
	return (i % POLL_EVERY) == 0 && p->poll != NULL && p->poll(p->poll_arg);
}

/* Events by (sequence, position, item). */
static int
cmp_event(const void *a, const void *b)
{
	const AffEvent *x = a;
	const AffEvent *y = b;

	if (x->seq != y->seq)
		return x->seq < y->seq ? -1 : 1;
	if (x->pos != y->pos)
		return x->pos < y->pos ? -1 : 1;
	return x->item < y->item ? -1 : x->item > y->item;
}

static int
cmp_i64(const void *a, const void *b)
{
	int64_t		x = *(const int64_t *) a;
	int64_t		y = *(const int64_t *) b;

	return x < y ? -1 : x > y;
}

/*
 * Sort n elements of size bytes at base by cmp, asking poll between runs
 * and between merge steps so a cancel is seen within a fraction of a
 * second even for tens of millions of elements: runs of SORT_RUN elements
 * are sorted with qsort, then merged pairwise through tmp (room for n
 * elements).  Returns 1 when poll asked to stop.
 */
#define SORT_RUN 65536

static int
polled_sort(void *base, int64_t n, size_t size, int (*cmp) (const void *, const void *),
			void *tmp, const AffSeqParams *p)
{
	char	   *src = base;
	char	   *dst = tmp;
	int64_t		width;
	int64_t		i;
	int64_t		since = 0;

	for (i = 0; i < n; i += SORT_RUN)
	{
		qsort(src + (size_t) i * size, (size_t) (n - i < SORT_RUN ? n - i : SORT_RUN), size, cmp);
		if (p->poll != NULL && p->poll(p->poll_arg))
			return 1;
	}
	for (width = SORT_RUN; width < n; width *= 2)
	{
		char	   *swap;

		for (i = 0; i < n; i += 2 * width)
		{
			int64_t		a = i;
			int64_t		am = i + width < n ? i + width : n;
			int64_t		b = am;
			int64_t		bm = i + 2 * width < n ? i + 2 * width : n;
			int64_t		o = i;

			while (a < am || b < bm)
			{
				int64_t		from;

				if (b >= bm || (a < am && cmp(src + (size_t) a * size, src + (size_t) b * size) <= 0))
					from = a++;
				else
					from = b++;
				memcpy(dst + (size_t) o++ * size, src + (size_t) from * size, size);
				if (++since == SORT_RUN * 4)
				{
					since = 0;
					if (p->poll != NULL && p->poll(p->poll_arg))
						return 1;
				}
			}
		}
		swap = src;
		src = dst;
		dst = swap;
	}
	if (src != (char *) base)
		memcpy(base, src, (size_t) n * size);
	return 0;
}

/* A successor while one item's rules are gathered. */
typedef struct Rule
{
	double		w;
	int32_t		q;
} Rule;

/* Heaviest first; equal weights by item index, so the order is one. */
static int
cmp_rule(const void *a, const void *b)
{
	const Rule *x = a;
	const Rule *y = b;

	if (x->w != y->w)
		return x->w > y->w ? -1 : 1;
	return x->q < y->q ? -1 : x->q > y->q;
}

double
aff_sequences_build_bytes(int64_t n)
{
	/*
	 * the sort's buffer (24 n, released before the rest is allocated),
	 * item keys (8 n), occurrences (4 n), and per item at most: offsets
	 * twice, accumulator, gathered rules, popularity (36 per item, items <= n)
	 */
	return (double) n * (24.0 + 12.0 + 36.0);
}

/*
 * Merge repeats, give every item an index and every event a global step
 * (a new sequence jumps past the window, so no window reaches across two),
 * counting sequences and steps.  Afterwards ev[e].item is the item index,
 * ev[e].pos the global step and ev[e].seq the sequence's ordinal.
 */
static AffStatus
number_events(AffEvent *ev, int64_t *n_io, const AffSeqParams *p, const AffAllocator *a,
			  int64_t **keys_out, int64_t *n_items_out, int64_t *info, AffSeqBuild *out,
			  AffError *err)
{
	int64_t		n = *n_io;
	int64_t		kept = 0;
	int64_t		n_items = 0;
	int64_t		i;
	int64_t	   *keys;
	int64_t		step = 0;
	int64_t		seq_no = -1;
	int64_t		seq_steps = 0;
	int64_t		prev_seq = 0;
	int64_t		prev_pos = 0;
	void	   *tmp;

	tmp = aff_alloc_array(a, (size_t) n, sizeof(AffEvent));
	if (tmp == NULL)
		return no_memory(err);
	if (polled_sort(ev, n, sizeof(AffEvent), cmp_event, tmp, p))
		return cancelled(err);
	for (i = 0; i < n; i++)
		if (kept == 0 || ev[i].seq != ev[kept - 1].seq || ev[i].pos != ev[kept - 1].pos ||
			ev[i].item != ev[kept - 1].item)
			ev[kept++] = ev[i];
	out->repeats_merged = n - kept;
	n = kept;

	keys = aff_alloc_array(a, (size_t) n, sizeof(int64_t));
	if (keys == NULL)
		return no_memory(err);
	for (i = 0; i < n; i++)
		keys[i] = ev[i].item;
	if (polled_sort(keys, n, sizeof(int64_t), cmp_i64, tmp, p))
		return cancelled(err);
	aff_release(a, tmp);
	for (i = 0; i < n; i++)
		if (n_items == 0 || keys[n_items - 1] != keys[i])
			keys[n_items++] = keys[i];
	if (n_items > AFF_MAX_ENTITIES)
		return aff_fail(err, AFF_ERR_LIMIT, "too many items for one value");
	if (p->poll != NULL && p->poll(p->poll_arg))
		return cancelled(err);

	for (i = 0; i < n; i++)
	{
		/* ev[i - 1] was rewritten already: compare with its original keys */
		bool		new_seq = i == 0 || ev[i].seq != prev_seq;
		bool		new_pos = new_seq || ev[i].pos != prev_pos;

		prev_seq = ev[i].seq;
		prev_pos = ev[i].pos;
		if (new_seq)
		{
			if (seq_no >= 0 && seq_steps == 1)
				info[AFF_SINFO_ONE_STEP]++;
			seq_no++;
			seq_steps = 1;
			step += (int64_t) p->window + 1;
			info[AFF_SINFO_STEPS]++;
		}
		else if (new_pos)
		{
			seq_steps++;
			step++;
			info[AFF_SINFO_STEPS]++;
		}
		ev[i].item = aff_find_key(keys, n_items, ev[i].item);
		AFF_ASSERT(ev[i].item >= 0);
		ev[i].pos = step;
		ev[i].seq = seq_no;
		if (polled_stop(p, i + 1))
			return cancelled(err);
	}
	if (seq_steps == 1)
		info[AFF_SINFO_ONE_STEP]++;
	info[AFF_SINFO_SEQUENCES] = seq_no + 1;
	info[AFF_SINFO_EVENTS] = n;
	*n_io = n;
	*keys_out = keys;
	*n_items_out = n_items;
	return AFF_OK;
}

/*
 * Room for want more kept rules in the growing output arrays; the memory
 * the build would then hold (the old and the new arrays during the copy)
 * is checked against the limit first.
 */
static AffStatus
reserve_rules(const AffSeqParams *p, double base, const AffAllocator *a, int32_t **idx,
			  float **w, int64_t *cap, int64_t used, int64_t want, AffError *err)
{
	int64_t		c = *cap;
	int32_t    *ni;
	float	   *nw;
	double		need;

	if (used + want <= c)
		return AFF_OK;
	while (c < used + want)
		c = c < 1024 ? 1024 : c * 2;
	need = p->held_bytes + base + 8.0 * ((double) c + (double) *cap);
	if (p->memory_limit > 0 && need > p->memory_limit)
	{
		aff_fail(err, AFF_ERR_LIMIT, "the sequential rules would need about %.0f MB, over the memory limit",
				 need / (1024.0 * 1024.0));
		aff_detail(err, "%lld rules are kept so far, with up to %d per item; the limit is %.0f MB.",
				   (long long) used, p->successors, p->memory_limit / (1024.0 * 1024.0));
		return aff_hint(err, "Lower \"successors\" or \"window\", or raise affinity.max_fit_memory.");
	}
	ni = aff_alloc_array(a, (size_t) c, sizeof(int32_t));
	nw = aff_alloc_array(a, (size_t) c, sizeof(float));
	if (ni == NULL || nw == NULL)
		return no_memory(err);
	if (used > 0)
	{
		memcpy(ni, *idx, sizeof(int32_t) * (size_t) used);
		memcpy(nw, *w, sizeof(float) * (size_t) used);
	}
	if (*idx != NULL)
	{
		aff_release(a, *idx);
		aff_release(a, *w);
	}
	*idx = ni;
	*w = nw;
	*cap = c;
	return AFF_OK;
}

AffStatus
aff_sequences_build(AffEvent *ev, int64_t n, const AffSeqParams *p, const AffAllocator *a,
					AffModelParts *parts, AffSeqBuild *out, AffError *err)
{
	int64_t	   *info;
	int64_t	   *keys = NULL;
	int64_t		n_items = 0;
	int64_t	   *occ_ptr;
	int32_t    *occ;
	double	   *acc;
	Rule	   *rules;
	float	   *pop;
	int64_t	   *ptr;
	int32_t    *ridx = NULL;
	float	   *rw = NULL;
	int64_t		cap = 0;
	int64_t		kept = 0;
	int64_t		i;
	int64_t		it;
	int64_t		work = 0;
	double		base;
	AffStatus	st;

	memset(out, 0, sizeof(*out));
	AFF_ASSERT(p->window >= 1 && p->window <= AFF_MAX_WINDOW);
	AFF_ASSERT(p->successors >= 1 && p->successors <= AFF_MAX_SUCCESSORS);
	if (n < 1)
		return aff_fail(err, AFF_ERR_INVALID, "affinity.fit_sequences received no usable rows");
	info = aff_alloc_array(a, AFF_SINFO_COUNT, sizeof(int64_t));
	if (info == NULL)
		return no_memory(err);
	memset(info, 0, sizeof(int64_t) * AFF_SINFO_COUNT);
	info[AFF_SINFO_WINDOW] = p->window;
	info[AFF_SINFO_SUCCESSORS] = p->successors;
	info[AFF_SINFO_POSITION] = p->position_type;
	if ((st = number_events(ev, &n, p, a, &keys, &n_items, info, out, err)) != AFF_OK)
		return st;

	/* each item's events, in event order (so by sequence, then step) */
	occ_ptr = aff_alloc_array(a, (size_t) n_items + 1, sizeof(int64_t));
	occ = aff_alloc_array(a, (size_t) n, sizeof(int32_t));
	acc = aff_alloc_array(a, (size_t) n_items, sizeof(double));
	rules = aff_alloc_array(a, (size_t) n_items, sizeof(Rule));
	pop = aff_alloc_array(a, (size_t) n_items, sizeof(float));
	ptr = aff_alloc_array(a, (size_t) n_items + 1, sizeof(int64_t));
	if (occ_ptr == NULL || occ == NULL || acc == NULL || rules == NULL || pop == NULL ||
		ptr == NULL)
		return no_memory(err);
	if (n > AFF_MAX_ENTITIES)
		return aff_fail(err, AFF_ERR_LIMIT, "too many events for one value");
	memset(occ_ptr, 0, sizeof(int64_t) * ((size_t) n_items + 1));
	for (i = 0; i < n; i++)
		occ_ptr[ev[i].item + 1]++;
	for (it = 0; it < n_items; it++)
		occ_ptr[it + 1] += occ_ptr[it];
	{
		int64_t    *fill = ptr;		/* borrowed as the fill cursor */

		memcpy(fill, occ_ptr, sizeof(int64_t) * (size_t) n_items);
		for (i = 0; i < n; i++)
			occ[fill[ev[i].item]++] = (int32_t) i;
	}
	for (it = 0; it < n_items; it++)
		acc[it] = 0;
	base = aff_sequences_build_bytes(n);

	/* the rules of each item p: its successors within the window, summed */
	for (it = 0; it < n_items; it++)
	{
		int64_t		n_rules = 0;
		int64_t		o;
		int64_t		last_seq = -1;
		int64_t		take;

		pop[it] = 0;
		for (o = occ_ptr[it]; o < occ_ptr[it + 1]; o++)
		{
			int64_t		e = occ[o];
			int64_t		x = ev[e].pos;
			int64_t		f;

			if (ev[e].seq != last_seq)
				pop[it] += 1;
			last_seq = ev[e].seq;
			for (f = e + 1; f < n && ev[f].pos - x <= p->window; f++)
			{
				int32_t		q = (int32_t) ev[f].item;

				if (ev[f].pos == x || q == it)
					continue;
				if (acc[q] == 0)
					rules[n_rules++].q = q;
				acc[q] += 1.0 / (double) (ev[f].pos - x);
				info[AFF_SINFO_PAIRS]++;
			}
			work += f - e;
		}
		for (o = 0; o < n_rules; o++)
		{
			rules[o].w = acc[rules[o].q];
			acc[rules[o].q] = 0;
		}
		info[AFF_SINFO_RULES] += n_rules;
		qsort(rules, (size_t) n_rules, sizeof(Rule), cmp_rule);
		take = n_rules < p->successors ? n_rules : p->successors;
		if ((st = reserve_rules(p, base, a, &ridx, &rw, &cap, kept, take, err)) != AFF_OK)
			return st;
		ptr[it] = kept;
		for (o = 0; o < take; o++)
		{
			ridx[kept] = rules[o].q;
			rw[kept] = (float) rules[o].w;
			if (!isfinite(rw[kept]))
				return aff_fail(err, AFF_ERR_LIMIT, "a rule's weight is beyond the range of real");
			kept++;
		}
		if (work > POLL_EVERY * 16 || (it % 1024) == 1023)
		{
			work = 0;
			if (p->poll != NULL && p->poll(p->poll_arg))
				return cancelled(err);
		}
	}
	ptr[n_items] = kept;
	info[AFF_SINFO_KEPT] = kept;
	if (kept == 0)
	{
		aff_fail(err, AFF_ERR_INVALID, "affinity.fit_sequences found no transition");
		aff_detail(err, "Of %lld sequences, %lld have one step only (every event at one position), "
				   "and no item is followed by another within %d steps in the others.",
				   (long long) info[AFF_SINFO_SEQUENCES], (long long) info[AFF_SINFO_ONE_STEP],
				   p->window);
		return aff_hint(err, "Check that the position orders the events of a sequence (a timestamp or a line number) and that the sequence key groups them.");
	}
	if (ridx == NULL && (st = reserve_rules(p, base, a, &ridx, &rw, &cap, 0, 1, err)) != AFF_OK)
		return st;
	aff_release(a, occ);
	aff_release(a, occ_ptr);
	aff_release(a, acc);
	aff_release(a, rules);

	{
		static const int64_t zero64[1] = {0};
		static const int32_t none32[1] = {0};
		static const float none_f[1] = {0};
		AffModelHeader *h = &parts->h;

		h->method = AFF_METHOD_SEQUENTIAL_RULES;
		h->n_users = 0;
		h->n_items = n_items;
		h->nnz = 0;
		parts->data[AFF_SEC_USER_KEYS] = zero64;
		parts->count[AFF_SEC_USER_KEYS] = 0;
		parts->data[AFF_SEC_SEEN_PTR] = zero64;
		parts->count[AFF_SEC_SEEN_PTR] = 1;
		parts->data[AFF_SEC_SEEN_ITEMS] = none32;
		parts->count[AFF_SEC_SEEN_ITEMS] = 0;
		parts->data[AFF_SEC_SEEN_WEIGHTS] = none_f;
		parts->count[AFF_SEC_SEEN_WEIGHTS] = 0;
	}
	parts->data[AFF_SEC_ITEM_KEYS] = keys;
	parts->count[AFF_SEC_ITEM_KEYS] = (uint64_t) n_items;
	parts->data[AFF_SEC_POPULARITY] = pop;
	parts->count[AFF_SEC_POPULARITY] = (uint64_t) n_items;
	parts->data[AFF_SEC_SEQUENCE_INFO] = info;
	parts->count[AFF_SEC_SEQUENCE_INFO] = AFF_SINFO_COUNT;
	parts->data[AFF_SEC_NEIGHBOR_PTR] = ptr;
	parts->count[AFF_SEC_NEIGHBOR_PTR] = (uint64_t) n_items + 1;
	parts->data[AFF_SEC_NEIGHBOR_IDX] = ridx;
	parts->count[AFF_SEC_NEIGHBOR_IDX] = (uint64_t) kept;
	parts->data[AFF_SEC_NEIGHBOR_SIM] = rw;
	parts->count[AFF_SEC_NEIGHBOR_SIM] = (uint64_t) kept;
	out->n_items = n_items;
	out->item_keys = keys;
	return AFF_OK;
}

static const int64_t *
seq_info(const AffModelView *v)
{
	return (const int64_t *) v->sections[AFF_SEC_SEQUENCE_INFO];
}

/* The successors of item it, by rule weight; every other item is skipped. */
static void
rules_item_row(const AffServe *s, int64_t it, float *sims, uint8_t *skip)
{
	const AffModelView *v = s->v;
	int64_t		j;

	memset(skip, 1, (size_t) v->h->n_items);
	for (j = v->neighbor_ptr[it]; j < v->neighbor_ptr[it + 1]; j++)
	{
		sims[v->neighbor_idx[j]] = v->neighbor_sim[j];
		skip[v->neighbor_idx[j]] = 0;
	}
}

/*
 * Scores of the next item after recent items idx[0 .. n) (ascending
 * indices) weighted by w (the recency weights, header comment): the
 * weighted sum of their rules.  Items that follow none of them score 0.
 */
static AffStatus
rules_basket_scores(const AffServe *s, const int32_t *idx, const float *w, int64_t n,
					float *scores, AffError *err)
{
	const AffModelView *v = s->v;
	int64_t		i;
	int64_t		j;

	(void) err;
	memset(scores, 0, sizeof(float) * (size_t) v->h->n_items);
	for (i = 0; i < n; i++)
		for (j = v->neighbor_ptr[idx[i]]; j < v->neighbor_ptr[idx[i] + 1]; j++)
			scores[v->neighbor_idx[j]] += (w ? w[i] : 1.0f) * v->neighbor_sim[j];
	return AFF_OK;
}

static AffStatus
bad_value(AffError *err, const char *what, long long a, long long b)
{
	aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
	return aff_detail(err, "The sequential rules' %s (%lld, %lld) are out of range.", what, a, b);
}

/*
 * The content checks of a rules value after the format's own (which
 * checked the neighbour lists' offsets and indices, no self rule, finite
 * weights): the header's unused fields, sequence_info, weights positive
 * and heaviest first, at most successors per item, popularity a whole
 * number of sequences.
 */
static AffStatus
rules_check(const AffModelView *v, AffPollFn poll, void *poll_arg, AffError *err)
{
	const AffModelHeader *h = v->h;
	const int64_t *info = seq_info(v);
	int64_t		n = h->n_items;
	int64_t		i;
	int64_t		j;
	int			k;

	if (h->regularization != 0 || h->alpha != 0 || h->epsilon != 0 || h->seed != 0 ||
		h->iterations != 0 || h->neighbors != 0 ||
		!isfinite(h->fit_seconds) || h->fit_seconds < 0)
		return bad_value(err, "header options", 0, 0);
	if (info[AFF_SINFO_WINDOW] < 1 || info[AFF_SINFO_WINDOW] > AFF_MAX_WINDOW ||
		info[AFF_SINFO_SUCCESSORS] < 1 || info[AFF_SINFO_SUCCESSORS] > AFF_MAX_SUCCESSORS)
		return bad_value(err, "window and successors", info[AFF_SINFO_WINDOW],
						 info[AFF_SINFO_SUCCESSORS]);
	if (info[AFF_SINFO_POSITION] < AFF_POSITION_NUMBER ||
		info[AFF_SINFO_POSITION] > AFF_POSITION_TIMESTAMPTZ)
		return bad_value(err, "position type", info[AFF_SINFO_POSITION], 0);
	for (k = 0; k < AFF_SINFO_COUNT; k++)
		if (info[k] < 0 || (k > AFF_SINFO_POSITION && info[k] != 0))
			return bad_value(err, "figures (field, value)", k, info[k]);
	if (info[AFF_SINFO_SEQUENCES] < 1 || info[AFF_SINFO_ONE_STEP] > info[AFF_SINFO_SEQUENCES] ||
		info[AFF_SINFO_EVENTS] < n || info[AFF_SINFO_STEPS] < info[AFF_SINFO_SEQUENCES] ||
		info[AFF_SINFO_STEPS] > info[AFF_SINFO_EVENTS] ||
		info[AFF_SINFO_KEPT] != (int64_t) v->neighbor_count ||
		info[AFF_SINFO_RULES] < info[AFF_SINFO_KEPT] ||
		info[AFF_SINFO_PAIRS] < info[AFF_SINFO_RULES])
		return bad_value(err, "counts (sequences, events)", info[AFF_SINFO_SEQUENCES],
						 info[AFF_SINFO_EVENTS]);
	if (v->neighbor_ptr == NULL)
		return bad_value(err, "rule lists", 0, 0);
	for (i = 0; i < n; i++)
	{
		float		pop = v->popularity[i];

		if (!(pop >= 1) || pop != floorf(pop) || pop > (float) info[AFF_SINFO_SEQUENCES])
		{
			/* pop may be NaN or beyond any integer: shown as a number */
			aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
			return aff_detail(err, "The sequential rules' popularity of item index %lld is %g, not a whole number of its %lld sequences.",
							  (long long) i, (double) pop, (long long) info[AFF_SINFO_SEQUENCES]);
		}
		if (v->neighbor_ptr[i + 1] - v->neighbor_ptr[i] > info[AFF_SINFO_SUCCESSORS])
			return bad_value(err, "successor counts (item index, count)", i,
							 v->neighbor_ptr[i + 1] - v->neighbor_ptr[i]);
		for (j = v->neighbor_ptr[i]; j < v->neighbor_ptr[i + 1]; j++)
			if (!(v->neighbor_sim[j] > 0) ||
				(j > v->neighbor_ptr[i] && v->neighbor_sim[j] > v->neighbor_sim[j - 1]))
				return bad_value(err, "rule weights (item index, position)", i,
								 j - v->neighbor_ptr[i]);
		if ((i % POLL_EVERY) == POLL_EVERY - 1 && poll != NULL && poll(poll_arg))
			return cancelled(err);
	}
	return AFF_OK;
}

/* The rules' figures for describe(), as a JSON fragment. */
static void
rules_describe(const AffModelView *v, char *buf, size_t len)
{
	const int64_t *info = seq_info(v);

	snprintf(buf, len,
			 "\"sequences\": {\"sequences\": %lld, \"one_step_sequences\": %lld, "
			 "\"events\": %lld, \"steps\": %lld, \"position\": \"%s\", \"window\": %lld, "
			 "\"successors\": %lld, \"pairs_counted\": %lld, \"rules\": %lld, "
			 "\"rules_kept\": %lld}",
			 (long long) info[AFF_SINFO_SEQUENCES], (long long) info[AFF_SINFO_ONE_STEP],
			 (long long) info[AFF_SINFO_EVENTS], (long long) info[AFF_SINFO_STEPS],
			 aff_position_name((int) info[AFF_SINFO_POSITION]),
			 (long long) info[AFF_SINFO_WINDOW], (long long) info[AFF_SINFO_SUCCESSORS],
			 (long long) info[AFF_SINFO_PAIRS], (long long) info[AFF_SINFO_RULES],
			 (long long) info[AFF_SINFO_KEPT]);
}

const AffMethod aff_method_sequential_rules = {
	.code = AFF_METHOD_SEQUENTIAL_RULES,
	.name = "sequential_rules",
	.sections = (1u << AFF_SEC_SEQUENCE_INFO) | (1u << AFF_SEC_NEIGHBOR_PTR) |
	(1u << AFF_SEC_NEIGHBOR_IDX) | (1u << AFF_SEC_NEIGHBOR_SIM),
	.options = AFF_OPT_BIT(AFF_OPT_WINDOW) | AFF_OPT_BIT(AFF_OPT_SUCCESSORS),
	.catalogue = true,
	.basket_scores = rules_basket_scores,
	.item_row = rules_item_row,
	.check_content = rules_check,
	.describe = rules_describe,
};
