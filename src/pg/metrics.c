/*
 * metrics.c
 *		affinity.ranking_metrics: an aggregate over held-out (user, item)
 *		rows that ranks each held-out user as top_items does (training items
 *		excluded) and averages ranking metrics over users.
 *
 * Binary relevance: an item is relevant to a user when it is among the
 * user's held-out items.  Held-out items the user already has in training
 * are left out (the ranking never shows them); users left with no relevant
 * item are counted in "users_without_new_items" and not averaged.  Users the
 * model does not know are counted in "unknown_users" and not averaged.
 * Definitions (README): precision@k = hits / k; recall@k = hits / |R|;
 * NDCG@k with binary gains and a log2 discount (Jarvelin and Kekalainen
 * 2002); MAP@k = sum over hit ranks r of precision@r, divided by
 * min(k, |R|); hit rate = share of users with a hit; coverage = distinct
 * recommended items / catalogue size.
 *
 * The state keeps the model argument as it came (a TOAST pointer is a few
 * bytes) and the pairs in a growing array; combine appends, serialize
 * writes both, so PostgreSQL can feed the aggregate from a parallel scan.
 * Every row must bring the same model: rows of two models without a GROUP
 * BY are refused, since the result would silently describe the first one.
 * A model is identified by its header (size, checksum, content digest),
 * read from the value inline or from the first TOAST chunk; a row that
 * brings the same TOAST pointer as the last accepted one is not read again.
 * The final function sorts the pairs in place and works on a copy of them
 * (FINALFUNC_MODIFY = SHAREABLE: it may run twice on one state).
 *
 * Keys are bigint or text, per side, as the aggregate's signature says (one
 * transition function serves every overload: it reads its argument types).
 * A text key is kept in the state's arena, length first, and the pair holds
 * its offset there.  The final function sorts the pairs by their keys, then
 * resolves each key to its index in the model (text_key_index compares the
 * text itself, so an unknown text never matches); keys the model does not
 * know get distinct negative numbers, and the metrics are computed over
 * indices alone.
 */
#include "serving_common.h"

#include <math.h>

#include "access/detoast.h"
#include "catalog/pg_type_d.h"
#include "libpq/pqformat.h"
#include "miscadmin.h"
#include "utils/float.h"
#include "utils/memutils.h"

#include "text_keys.h"
#include "../core/serve.h"

/*
 * A held-out pair: each side a bigint key or the arena offset of a text key
 * as collected; in the copy resolve_pairs() makes, the model's index of each
 * key, or a negative number for a key the model does not know.
 */
typedef struct HeldOut
{
	int64		user;
	int64		item;
} HeldOut;

/* What tells two model values apart without reading them whole. */
typedef struct ModelIdentity
{
	uint64		total_size;
	uint64		checksum;
	uint8		digest[32];
} ModelIdentity;

typedef struct MetricsState
{
	MemoryContext cxt;
	struct varlena *model;		/* raw argument, copied once */
	ModelIdentity id;			/* of model */
	bool		have_ptr;		/* last_ptr holds an accepted TOAST pointer */
	struct varatt_external last_ptr;
	int32		k;
	bool		kinds_set;		/* user_text and item_text are known */
	bool		user_text;		/* the user keys are text */
	bool		item_text;		/* the item keys are text */
	char	   *arena;			/* text keys: int32 length, then the bytes */
	int64		arena_len;
	int64		arena_cap;
	HeldOut    *pairs;
	int64		n;
	int64		cap;
} MetricsState;

static MetricsState *
state_new(MemoryContext cxt)
{
	MetricsState *st = MemoryContextAllocZero(cxt, sizeof(MetricsState));

	st->cxt = cxt;
	st->k = -1;
	return st;
}

static void
state_add(MetricsState *st, int64 user, int64 item)
{
	if (st->n == st->cap)
	{
		int64		cap = st->cap ? st->cap * 2 : 1024;

		if (cap > (int64) (MaxAllocHugeSize / sizeof(HeldOut)))
			ereport(ERROR,
					(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
					 errmsg("too many held-out rows for one affinity.ranking_metrics")));
		st->pairs = st->pairs
			? repalloc_huge(st->pairs, sizeof(HeldOut) * cap)
			: MemoryContextAllocHuge(st->cxt, sizeof(HeldOut) * cap);
		st->cap = cap;
	}
	st->pairs[st->n].user = user;
	st->pairs[st->n].item = item;
	st->n++;
}

/* Copy len bytes of text into the arena, length first; returns its offset. */
static int64
arena_add(MetricsState *st, const char *s, int32 len)
{
	int64		need = (int64) sizeof(int32) + len;
	int64		off = st->arena_len;

	if (st->arena_len > (int64) MaxAllocHugeSize - need)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("too many held-out text keys for one affinity.ranking_metrics")));
	if (st->arena_len + need > st->arena_cap)
	{
		int64		cap = Max(st->arena_cap, 4096);

		while (cap < st->arena_len + need)
			cap = Min(cap * 2, (int64) MaxAllocHugeSize);
		st->arena = st->arena
			? repalloc_huge(st->arena, cap)
			: MemoryContextAllocHuge(st->cxt, cap);
		st->arena_cap = cap;
	}
	memcpy(st->arena + off, &len, sizeof(int32));
	memcpy(st->arena + off + sizeof(int32), s, len);
	st->arena_len += need;
	return off;
}

/* The text key stored at offset off of the arena. */
static const char *
arena_text(const MetricsState *st, int64 off, int32 *len)
{
	memcpy(len, st->arena + off, sizeof(int32));
	return st->arena + off + sizeof(int32);
}

/* Fix the key kinds of a state; every state of one aggregate has the same. */
static void
state_set_kinds(MetricsState *st, bool user_text, bool item_text)
{
	if (!st->kinds_set)
	{
		st->kinds_set = true;
		st->user_text = user_text;
		st->item_text = item_text;
	}
	else if (st->user_text != user_text || st->item_text != item_text)
		elog(ERROR, "ranking_metrics states of different key types");
}

/* The held-out key of one side of a row: a bigint, or a text into the arena. */
static int64
key_value(FunctionCallInfo fcinfo, MetricsState *st, int argno, bool text_key)
{
	text	   *t;

	if (!text_key)
		return PG_GETARG_INT64(argno);
	t = PG_GETARG_TEXT_PP(argno);
	return arena_add(st, VARDATA_ANY(t), (int32) VARSIZE_ANY_EXHDR(t));
}

/*
 * The identity of a raw model argument: its header's size, checksum and
 * digest.  An on-disk value is read only as far as its header; a value too
 * short for a header gets an identity of its size alone (the final function
 * refuses it anyway).
 */
static void
model_identity(struct varlena *raw, ModelIdentity *id)
{
	AffModelHeader h;
	struct varlena *v = raw;

	memset(id, 0, sizeof(*id));
	if (VARATT_IS_EXTERNAL(raw) || VARATT_IS_COMPRESSED(raw) || VARATT_IS_SHORT(raw))
		v = detoast_attr_slice(raw, 0, sizeof(AffModelHeader));
	if (VARSIZE(v) < sizeof(AffModelHeader))
		id->total_size = VARSIZE(v);
	else
	{
		memcpy(&h, v, sizeof(h));
		id->total_size = h.total_size;
		id->checksum = h.checksum;
		memcpy(id->digest, h.content_digest, sizeof(id->digest));
	}
	if (v != raw)
		pfree(v);
}

/* Remember an accepted TOAST pointer, so that the next row with it is not read. */
static void
remember_pointer(MetricsState *st, struct varlena *raw)
{
	st->have_ptr = VARATT_IS_EXTERNAL_ONDISK(raw);
	if (st->have_ptr)
		VARATT_EXTERNAL_GET_POINTER(st->last_ptr, raw);
}

/* Refuse a row whose model is not the one the aggregate started with. */
static void
check_same_model(MetricsState *st, struct varlena *raw)
{
	ModelIdentity id;

	if (st->have_ptr && VARATT_IS_EXTERNAL_ONDISK(raw))
	{
		struct varatt_external ptr;

		VARATT_EXTERNAL_GET_POINTER(ptr, raw);
		if (ptr.va_toastrelid == st->last_ptr.va_toastrelid &&
			ptr.va_valueid == st->last_ptr.va_valueid &&
			ptr.va_rawsize == st->last_ptr.va_rawsize)
			return;
	}
	model_identity(raw, &id);
	if (id.total_size != st->id.total_size || id.checksum != st->id.checksum ||
		memcmp(id.digest, st->id.digest, sizeof(id.digest)) != 0)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("the model must be the same on every row of affinity.ranking_metrics"),
				 errdetail("The rows bring a model of %llu bytes with checksum %016llx, then one of %llu bytes with checksum %016llx.",
						   (unsigned long long) st->id.total_size,
						   (unsigned long long) st->id.checksum,
						   (unsigned long long) id.total_size,
						   (unsigned long long) id.checksum),
				 errhint("To evaluate several models in one query, give each its own aggregate: a subquery per model over the held-out rows, or GROUP BY the model's name.")));
	remember_pointer(st, raw);
}

/* Keep the first model and k; every row must bring the same model and k. */
static void
state_set_model(MetricsState *st, struct varlena *raw, int32 k)
{
	if (st->model == NULL)
	{
		Size		len = VARSIZE_ANY(raw);

		if (k < 0)
			ereport(ERROR,
					(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
					 errmsg("k must not be negative"),
					 errdetail("k is %d.", k)));
		st->model = MemoryContextAllocHuge(st->cxt, len);
		memcpy(st->model, raw, len);
		model_identity(st->model, &st->id);
		remember_pointer(st, st->model);
		st->k = k;
		return;
	}
	if (st->k != k)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("k must be the same on every row of affinity.ranking_metrics"),
				 errdetail("k changed from %d to %d.", st->k, k)));
	check_same_model(st, raw);
}

PG_FUNCTION_INFO_V1(affinity_ranking_metrics_transfn);

/*
 * (state, model, user_id, item_id [, k = 10]) -> state; NULL rows are
 * skipped.  user_id and item_id are bigint or text, as the overload says.
 */
Datum
affinity_ranking_metrics_transfn(PG_FUNCTION_ARGS)
{
	MemoryContext aggcxt;
	MetricsState *st;
	int64		user;

	if (!AggCheckCallContext(fcinfo, &aggcxt))
		elog(ERROR, "ranking_metrics_transfn called in non-aggregate context");
	st = PG_ARGISNULL(0) ? state_new(aggcxt) : (MetricsState *) PG_GETARG_POINTER(0);
	if (!st->kinds_set)
	{
		Oid			ut = get_fn_expr_argtype(fcinfo->flinfo, 2);
		Oid			it = get_fn_expr_argtype(fcinfo->flinfo, 3);

		if (!OidIsValid(ut) || !OidIsValid(it))
			elog(ERROR, "ranking_metrics_transfn cannot determine its key types");
		state_set_kinds(st, ut == TEXTOID, it == TEXTOID);
	}
	if (PG_ARGISNULL(1) || PG_ARGISNULL(2) || PG_ARGISNULL(3))
		PG_RETURN_POINTER(st);
	if (PG_NARGS() > 4 && PG_ARGISNULL(4))
		ereport(ERROR,
				(errcode(ERRCODE_NULL_VALUE_NOT_ALLOWED),
				 errmsg("argument \"k\" must not be NULL")));
	state_set_model(st, (struct varlena *) PG_GETARG_RAW_VARLENA_P(1),
					PG_NARGS() > 4 ? PG_GETARG_INT32(4) : 10);
	user = key_value(fcinfo, st, 2, st->user_text);
	state_add(st, user, key_value(fcinfo, st, 3, st->item_text));
	PG_RETURN_POINTER(st);
}

PG_FUNCTION_INFO_V1(affinity_ranking_metrics_combinefn);

Datum
affinity_ranking_metrics_combinefn(PG_FUNCTION_ARGS)
{
	MemoryContext aggcxt;
	MetricsState *a;
	MetricsState *b;
	int64		i;
	int64		base;

	if (!AggCheckCallContext(fcinfo, &aggcxt))
		elog(ERROR, "ranking_metrics_combinefn called in non-aggregate context");
	if (PG_ARGISNULL(1))
		PG_RETURN_POINTER(PG_ARGISNULL(0) ? NULL : PG_GETARG_POINTER(0));
	b = (MetricsState *) PG_GETARG_POINTER(1);
	a = PG_ARGISNULL(0) ? state_new(aggcxt) : (MetricsState *) PG_GETARG_POINTER(0);
	if (b->model != NULL)
		state_set_model(a, b->model, b->k);
	if (!b->kinds_set)
		PG_RETURN_POINTER(a);
	state_set_kinds(a, b->user_text, b->item_text);
	/* b's texts go to the end of a's arena, one by one (offsets move by base) */
	base = a->arena_len;
	if (b->arena_len > 0)
	{
		int64		off = 0;

		while (off < b->arena_len)
		{
			int32		len;
			const char *t = arena_text(b, off, &len);

			arena_add(a, t, len);
			off += (int64) sizeof(int32) + len;
		}
	}
	for (i = 0; i < b->n; i++)
		state_add(a, b->pairs[i].user + (a->user_text ? base : 0),
				  b->pairs[i].item + (a->item_text ? base : 0));
	PG_RETURN_POINTER(a);
}

PG_FUNCTION_INFO_V1(affinity_ranking_metrics_serialfn);

Datum
affinity_ranking_metrics_serialfn(PG_FUNCTION_ARGS)
{
	MetricsState *st = (MetricsState *) PG_GETARG_POINTER(0);
	StringInfoData buf;
	int64		i;

	pq_begintypsend(&buf);
	pq_sendint32(&buf, st->k);
	pq_sendint32(&buf, st->model ? (int32) VARSIZE_ANY(st->model) : 0);
	if (st->model)
		pq_sendbytes(&buf, (char *) st->model, VARSIZE_ANY(st->model));
	pq_sendbyte(&buf, st->kinds_set);
	pq_sendbyte(&buf, st->user_text);
	pq_sendbyte(&buf, st->item_text);
	pq_sendint64(&buf, st->arena_len);
	if (st->arena_len > 0)
		pq_sendbytes(&buf, st->arena, (int) st->arena_len);
	pq_sendint64(&buf, st->n);
	for (i = 0; i < st->n; i++)
	{
		pq_sendint64(&buf, st->pairs[i].user);
		pq_sendint64(&buf, st->pairs[i].item);
	}
	PG_RETURN_BYTEA_P(pq_endtypsend(&buf));
}

PG_FUNCTION_INFO_V1(affinity_ranking_metrics_deserialfn);

Datum
affinity_ranking_metrics_deserialfn(PG_FUNCTION_ARGS)
{
	bytea	   *b = PG_GETARG_BYTEA_PP(0);
	MemoryContext aggcxt;
	MetricsState *st;
	StringInfoData buf;
	int32		len;
	int64		n;
	int64		i;
	bool		kinds_set;
	bool		user_text;
	bool		item_text;
	int64		arena_len;

	if (!AggCheckCallContext(fcinfo, &aggcxt))
		elog(ERROR, "ranking_metrics_deserialfn called in non-aggregate context");
	st = state_new(aggcxt);
	buf.data = VARDATA_ANY(b);
	buf.len = VARSIZE_ANY_EXHDR(b);
	buf.maxlen = 0;
	buf.cursor = 0;
	st->k = pq_getmsgint(&buf, 4);
	len = pq_getmsgint(&buf, 4);
	if (len > 0)
	{
		st->model = MemoryContextAllocHuge(aggcxt, len);
		memcpy(st->model, pq_getmsgbytes(&buf, len), len);
		model_identity(st->model, &st->id);
		remember_pointer(st, st->model);
	}
	kinds_set = pq_getmsgbyte(&buf) != 0;
	user_text = pq_getmsgbyte(&buf) != 0;
	item_text = pq_getmsgbyte(&buf) != 0;
	if (kinds_set)
		state_set_kinds(st, user_text, item_text);
	arena_len = pq_getmsgint64(&buf);
	if (arena_len < 0 || arena_len > buf.len - buf.cursor)
		elog(ERROR, "ranking_metrics state of a bad size");
	if (arena_len > 0)
	{
		st->arena = MemoryContextAllocHuge(aggcxt, arena_len);
		memcpy(st->arena, pq_getmsgbytes(&buf, (int) arena_len), arena_len);
		st->arena_len = st->arena_cap = arena_len;
	}
	n = pq_getmsgint64(&buf);
	for (i = 0; i < n; i++)
	{
		int64		u = pq_getmsgint64(&buf);

		state_add(st, u, pq_getmsgint64(&buf));
	}
	pq_getmsgend(&buf);
	PG_RETURN_POINTER(st);
}

/* Order of two keys of one side: bigint by value, text by bytes then length. */
static int
cmp_key(const MetricsState *st, bool text_key, int64 a, int64 b)
{
	const char *pa;
	const char *pb;
	int32		la;
	int32		lb;
	int			c;

	if (!text_key)
		return a < b ? -1 : (a > b);
	pa = arena_text(st, a, &la);
	pb = arena_text(st, b, &lb);
	c = memcmp(pa, pb, Min(la, lb));
	if (c != 0)
		return c < 0 ? -1 : 1;
	return la < lb ? -1 : (la > lb);
}

/* qsort_arg comparator of held-out pairs: by user key, then item key. */
static int
cmp_heldout(const void *a, const void *b, void *arg)
{
	const MetricsState *st = arg;
	const HeldOut *x = a;
	const HeldOut *y = b;
	int			c = cmp_key(st, st->user_text, x->user, y->user);

	if (c != 0)
		return c;
	return cmp_key(st, st->item_text, x->item, y->item);
}

/* Whether the model's user (or item) keys are text. */
static bool
model_side_text(const AffModelView *v, bool users)
{
	return aff_keys_side_text(v->h->key_type, users);
}

/*
 * Whether the held-out keys' types do not suit the model, by the serving
 * functions' rule: bigint keys only on a bigint side, text keys on any
 * model with a text side (a bigint side's keys as decimal text).
 */
static bool
held_out_mismatch(const AffModelView *v, const MetricsState *st)
{
	if (v->h->key_type == AFF_KEYS_BIGINT)
		return st->user_text || st->item_text;
	return (!st->user_text && model_side_text(v, true)) ||
		(!st->item_text && model_side_text(v, false));
}

/*
 * The model's index of one held-out key, or -1 when it does not know it
 * (a text key on a bigint side: text_key_lookup).
 */
static int64
key_index(const MetricsState *st, const AffModelView *v, bool users, int64 key)
{
	if (users ? st->user_text : st->item_text)
	{
		int32		len;
		const char *s = arena_text(st, key, &len);

		return text_key_lookup(v, users, s, len);
	}
	return aff_find_key(users ? v->user_keys : v->item_keys,
						users ? v->h->n_users : v->h->n_items, key);
}

/*
 * Sort the pairs by their keys and return a copy in which each key is its
 * index in the model; keys the model does not know get distinct negative
 * numbers (one per distinct key within a user), so that equal keys stay
 * equal and adjacent.  The state keeps its keys, sorted: the final function
 * may run again on it (FINALFUNC_MODIFY = SHAREABLE).
 */
static HeldOut *
resolve_pairs(MetricsState *st, const AffModelView *v)
{
	HeldOut    *out = palloc_extended(sizeof(HeldOut) * Max(st->n, 1), MCXT_ALLOC_HUGE);
	HeldOut		prev = {0, 0};
	int64		unknown = 0;
	int64		u = -1;
	int64		it = -1;
	int64		j;

	qsort_arg(st->pairs, st->n, sizeof(HeldOut), cmp_heldout, st);
	for (j = 0; j < st->n; j++)
	{
		HeldOut		raw = st->pairs[j];
		bool		new_user = j == 0 || cmp_key(st, st->user_text, raw.user, prev.user) != 0;
		bool		new_item = new_user || cmp_key(st, st->item_text, raw.item, prev.item) != 0;

		if ((j & 0xFFFF) == 0)
			CHECK_FOR_INTERRUPTS();
		if (new_user)
		{
			u = key_index(st, v, true, raw.user);
			if (u < 0)
				u = -(++unknown);
		}
		if (new_item)
		{
			it = key_index(st, v, false, raw.item);
			if (it < 0)
				it = -(++unknown);
		}
		prev = raw;
		out[j].user = u;
		out[j].item = it;
	}
	return out;
}

typedef struct Sums
{
	int64		users;
	int64		unknown;
	int64		without_new;
	double		precision;
	double		recall;
	double		ndcg;
	double		map;
	double		hits;
	int64		covered;
} Sums;

/*
 * Score one known user: rel[] marks the user's relevant item indices
 * (n_rel of them); shown[] collects recommended items for coverage.
 */
static void
score_user(const AffModelView *v, int64 u, int64 k, const uint8 *rel, int64 n_rel,
		   float *scores, uint8 *shown, Sums *s)
{
	AffTopK		t;
	AffItemFilter flt;
	int64		kk = Min(k, v->h->n_items);
	AffScored  *heap = palloc_extended(sizeof(AffScored) * Max(kk, 1), MCXT_ALLOC_HUGE);
	double		dcg = 0;
	double		idcg = 0;
	double		ap = 0;
	int64		hits = 0;
	int64		n;
	int64		r;

	AFF_ASSERT(u >= 0 && u < v->h->n_users && k >= 1);
	/* the user's unseen items, through the engine's top-k kernel */
	user_scores(v, u, scores);
	memset(&flt, 0, sizeof(flt));
	flt.seen = v->seen_items + v->seen_ptr[u];
	flt.n_seen = v->seen_ptr[u + 1] - v->seen_ptr[u];
	aff_topk_init(&t, heap, kk);
	r = aff_topk_scores(scores, v->h->n_items, &flt, &t);
	if (r >= 0)
		check_finite_scores(v, false, r, psprintf("user %s", key_cstring(v, true, u)));
	n = aff_topk_finish(&t);
	for (r = 0; r < n; r++)
	{
		int32		it = heap[r].index;

		if (!shown[it])
		{
			shown[it] = 1;
			s->covered++;
		}
		if (rel[it])
		{
			hits++;
			dcg += 1.0 / log2((double) r + 2.0);
			ap += (double) hits / (double) (r + 1);
		}
	}
	for (r = 0; r < Min(k, n_rel); r++)
		idcg += 1.0 / log2((double) r + 2.0);
	s->users++;
	s->precision += (double) hits / (double) k;
	s->recall += (double) hits / (double) n_rel;
	s->ndcg += idcg > 0 ? dcg / idcg : 0;
	s->map += ap / (double) Min(k, n_rel);
	s->hits += hits > 0 ? 1 : 0;
	pfree(heap);
}

/*
 * Walk the resolved pairs (resolve_pairs) user by user; rel is a mask over
 * item indices that is set and cleared per user.
 */
static void
evaluate(const AffModelView *v, HeldOut *pairs, int64 n, int64 k, Sums *s)
{
	uint8	   *rel = palloc0(v->h->n_items);
	uint8	   *shown = palloc0(v->h->n_items);
	float	   *scores = palloc_extended(sizeof(float) * v->h->n_items, MCXT_ALLOC_HUGE);
	int64		a = 0;

	while (a < n)
	{
		int64		b = a;
		int64		u;
		int64		n_rel = 0;
		int64		j;

		CHECK_FOR_INTERRUPTS();
		while (b < n && pairs[b].user == pairs[a].user)
			b++;
		u = pairs[a].user;
		if (u < 0)
		{
			s->unknown++;
			a = b;
			continue;
		}
		for (j = v->seen_ptr[u]; j < v->seen_ptr[u + 1]; j++)
			rel[v->seen_items[j]] = 2;	/* in training: not relevant */
		for (j = a; j < b; j++)
		{
			int64		it = pairs[j].item;

			/* items new to the catalogue are relevant but never shown */
			if (j > a && pairs[j].item == pairs[j - 1].item)
				continue;
			if (it < 0)
				n_rel++;
			else if (rel[it] == 0)
			{
				rel[it] = 1;
				n_rel++;
			}
		}
		if (n_rel == 0)
			s->without_new++;
		else
			score_user(v, u, k, rel, n_rel, scores, shown, s);
		for (j = v->seen_ptr[u]; j < v->seen_ptr[u + 1]; j++)
			rel[v->seen_items[j]] = 0;
		for (j = a; j < b; j++)
		{
			int64		it = pairs[j].item;

			if (it >= 0)
				rel[it] = 0;
		}
		a = b;
	}
}

PG_FUNCTION_INFO_V1(affinity_ranking_metrics_finalfn);

Datum
affinity_ranking_metrics_finalfn(PG_FUNCTION_ARGS)
{
	MetricsState *st;
	AffModelView v;
	AffError	err;
	struct varlena *m;
	Sums		s;
	StringInfoData out;
	double		nu;

	if (PG_ARGISNULL(0))
		PG_RETURN_NULL();
	st = (MetricsState *) PG_GETARG_POINTER(0);
	if (st->model == NULL)
		PG_RETURN_NULL();
	/*
	 * The state's own copy is read in place when it is a plain value (a
	 * model fitted in the same query arrives so): it was allocated by
	 * state_set_model or the deserialize function with palloc's alignment,
	 * which the view needs, it lives as long as the state, and the view
	 * only reads it (FINALFUNC_MODIFY = SHAREABLE holds).  Nothing is
	 * trusted that was not before: the view below checks the same bytes a
	 * copy would hold.  A TOAST pointer, compressed or short-header value
	 * is detoasted into a fresh (aligned) copy, as before.
	 */
	if (VARATT_IS_EXTENDED(st->model))
		m = (struct varlena *) PG_DETOAST_DATUM_COPY(PointerGetDatum(st->model));
	else
		m = st->model;
	if (aff_model_view((const uint8 *) m, VARSIZE(m), &v, &err) != AFF_OK)
		report_engine_error(&err);
	if (model_method(&v)->catalogue)
		refuse_catalogue(&v, "ranking_metrics");
	if (held_out_mismatch(&v, st))
		ereport(ERROR,
				(errcode(ERRCODE_DATATYPE_MISMATCH),
				 errmsg("this model has %s user ids and %s item ids, but ranking_metrics was given %s and %s",
						model_side_text(&v, true) ? "text" : "bigint",
						model_side_text(&v, false) ? "text" : "bigint",
						st->user_text ? "text" : "bigint", st->item_text ? "text" : "bigint"),
				 errdetail("Held-out keys are compared with the keys the model was fitted on."),
				 errhint("Pass the held-out columns as the model's key types, for example user_id::%s and item_id::%s.",
						 model_side_text(&v, true) ? "text" : "bigint",
						 model_side_text(&v, false) ? "text" : "bigint")));
	if (st->k == 0)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("k must be at least 1 for ranking metrics")));
	memset(&s, 0, sizeof(s));
	evaluate(&v, resolve_pairs(st, &v), st->n, st->k, &s);
	nu = s.users > 0 ? (double) s.users : 1.0;
	initStringInfo(&out);
	appendStringInfo(&out, "{\"users\": " INT64_FORMAT ", \"k\": %d, \"precision\": %s, "
					 "\"recall\": %s, \"ndcg\": %s, \"map\": %s, \"hit_rate\": %s, "
					 "\"coverage\": %s, \"unknown_users\": " INT64_FORMAT
					 ", \"users_without_new_items\": " INT64_FORMAT "}",
					 s.users, st->k, float8out_internal(s.precision / nu),
					 float8out_internal(s.recall / nu), float8out_internal(s.ndcg / nu),
					 float8out_internal(s.map / nu), float8out_internal(s.hits / nu),
					 float8out_internal((double) s.covered / (double) v.h->n_items),
					 s.unknown, s.without_new);
	PG_RETURN_JSONB_P(jsonb_from_cstring(out.data));
}
