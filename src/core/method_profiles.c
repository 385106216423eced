/*
 * method_profiles.c
 *		item_profiles as a method: a catalogue's item x feature matrix,
 *		built from feature rows (words, one-hot categories, numeric
 *		attributes) or from dense vectors made elsewhere, and items like an
 *		item by the cosine of their rows.
 *
 * Nothing is fitted from purchases: the value has no users and no
 * training pairs, and of the serving operations it has only item_row (the
 * binding refuses the others for such a value, AffMethod.catalogue).
 * Normalisation (profile_info): none; l2 (each row divided by its
 * Euclidean norm); tfidf (each value times idf = ln(n_items / df), df the
 * number of items holding the feature, then l2: the "ltc"-style weighting
 * without the log on the term frequency; Manning, Raghavan, Schuetze 2008,
 * "Introduction to Information Retrieval", sections 6.2.1 and 6.4.3).
 * Cosine look-alikes are the same for none and l2; tfidf changes them.
 */
#include "profiles.h"
#include "method.h"
#include "text_key.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define POLL_EVERY 65536

static const int64_t zero64[1] = {0};
static const int32_t none32[1] = {0};
static const float none_f[1] = {0};

const char *
aff_normalization_name(int code)
{
	switch (code)
	{
		case AFF_NORM_NONE:
			return "none";
		case AFF_NORM_L2:
			return "l2";
		case AFF_NORM_TFIDF:
			return "tfidf";
	}
	return "unknown";
}

static int
polled_stop(const AffProfileParams *p, int64_t i)
{
	return (i % POLL_EVERY) == 0 && p->poll != NULL && p->poll(p->poll_arg);
}

static AffStatus
cancelled(AffError *err)
{
	return aff_fail(err, AFF_ERR_CANCELLED, "building the item profiles was cancelled");
}

/* Rows by (item, feature, value bits): equal rows are summed in one order. */
static int
cmp_triple(const void *a, const void *b)
{
	const AffTriple *x = a;
	const AffTriple *y = b;
	uint32_t	wx;
	uint32_t	wy;

	if (x->user != y->user)
		return x->user < y->user ? -1 : 1;
	if (x->item != y->item)
		return x->item < y->item ? -1 : 1;
	memcpy(&wx, &x->weight, 4);
	memcpy(&wy, &y->weight, 4);
	return wx < wy ? -1 : wx > wy;
}

static int
cmp_i64(const void *a, const void *b)
{
	int64_t		x = *(const int64_t *) a;
	int64_t		y = *(const int64_t *) b;

	return x < y ? -1 : x > y;
}

/*
 * The header and the common sections of a value without users: no user
 * keys, empty training lists, popularity all zero (nobody bought anything
 * yet, as far as the value knows).
 */
static AffStatus
catalogue_header(AffModelParts *parts, int64_t n_items, int64_t *item_keys,
				 const AffAllocator *a, AffError *err)
{
	AffModelHeader *h = &parts->h;
	float	   *pop;

	h->method = AFF_METHOD_ITEM_PROFILES;
	h->n_users = 0;
	h->n_items = n_items;
	h->nnz = 0;
	pop = aff_alloc_array(a, (size_t) n_items, sizeof(float));
	if (pop == NULL)
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the item profiles");
	memset(pop, 0, sizeof(float) * (size_t) n_items);
	parts->data[AFF_SEC_USER_KEYS] = zero64;
	parts->count[AFF_SEC_USER_KEYS] = 0;
	parts->data[AFF_SEC_ITEM_KEYS] = item_keys;
	parts->count[AFF_SEC_ITEM_KEYS] = (uint64_t) n_items;
	parts->data[AFF_SEC_SEEN_PTR] = zero64;
	parts->count[AFF_SEC_SEEN_PTR] = 1;
	parts->data[AFF_SEC_SEEN_ITEMS] = none32;
	parts->count[AFF_SEC_SEEN_ITEMS] = 0;
	parts->data[AFF_SEC_SEEN_WEIGHTS] = none_f;
	parts->count[AFF_SEC_SEEN_WEIGHTS] = 0;
	parts->data[AFF_SEC_POPULARITY] = pop;
	parts->count[AFF_SEC_POPULARITY] = (uint64_t) n_items;
	return AFF_OK;
}

static int64_t *
new_info(const AffAllocator *a)
{
	int64_t    *info = aff_alloc_array(a, AFF_PINFO_COUNT, sizeof(int64_t));

	if (info != NULL)
		memset(info, 0, sizeof(int64_t) * AFF_PINFO_COUNT);
	return info;
}

/* Divide each of n rows (CSR or dense) by its norm; returns rows left at zero. */
static int64_t
normalise_rows(const int64_t *ptr, float *val, int64_t n, int dim)
{
	int64_t		empty = 0;
	int64_t		i;
	int64_t		j;

	for (i = 0; i < n; i++)
	{
		int64_t		lo = ptr ? ptr[i] : i * dim;
		int64_t		hi = ptr ? ptr[i + 1] : lo + dim;
		double		ss = 0;

		for (j = lo; j < hi; j++)
			ss += (double) val[j] * val[j];
		if (ss == 0 || !isfinite(ss))
		{
			empty += ss == 0;
			continue;
		}
		ss = sqrt(ss);
		for (j = lo; j < hi; j++)
			val[j] = (float) (val[j] / ss);
	}
	return empty;
}

/* Rows whose values are all zero. */
static int64_t
count_empty(const int64_t *ptr, const float *val, int64_t n, int dim)
{
	int64_t		empty = 0;
	int64_t		i;
	int64_t		j;

	for (i = 0; i < n; i++)
	{
		int64_t		lo = ptr ? ptr[i] : i * dim;
		int64_t		hi = ptr ? ptr[i + 1] : lo + dim;
		int			any = 0;

		for (j = lo; j < hi && !any; j++)
			any = val[j] != 0;
		empty += !any;
	}
	return empty;
}

/*
 * Sort and sum the rows, count items and features, drop features in fewer
 * than min_df items, lay the rows out as CSR over the kept features (in
 * key order), weight and normalise.
 */
AffStatus
aff_profiles_build_sparse(AffTriple *rows, int64_t n, const AffProfileParams *p,
						  const AffAllocator *a, AffModelParts *parts,
						  AffProfileBuild *out, AffError *err)
{
	int64_t		kept = 0;
	int64_t		n_items = 0;
	int64_t		n_feat = 0;
	int64_t		n_keep = 0;
	int64_t		nnz = 0;
	int64_t		i;
	int64_t	   *fkeys;
	int32_t	   *df;
	int32_t	   *remap;
	int64_t	   *ikeys;
	int64_t	   *ptr;
	int32_t	   *fidx;
	float	   *val;
	int64_t	   *kkeys;
	int32_t	   *kdf;
	int64_t	   *info;
	AffStatus	st;

	memset(out, 0, sizeof(*out));
	if (n < 1)
		return aff_fail(err, AFF_ERR_INVALID, "affinity.item_profiles received no usable rows");
	qsort(rows, (size_t) n, sizeof(AffTriple), cmp_triple);
	if (p->poll != NULL && p->poll(p->poll_arg))
		return cancelled(err);

	/* sum equal (item, feature) rows in double; drop sums of zero */
	for (i = 0; i < n;)
	{
		int64_t		j = i;
		double		s = 0;

		while (j < n && rows[j].user == rows[i].user && rows[j].item == rows[i].item)
			s += rows[j++].weight;
		out->duplicates_summed += j - i - 1;
		if (!isfinite((float) s))
		{
			out->bad_key[0] = rows[i].user;
			out->bad_key[1] = rows[i].item;
			aff_fail(err, AFF_ERR_INVALID, "summed feature value is out of range");
			return aff_detail(err, "The values of one item and feature add up to %g, beyond the range of real.", s);
		}
		if (s != 0)
		{
			rows[kept] = rows[i];
			rows[kept].weight = (float) s;
			kept++;
		}
		if (polled_stop(p, i + 1))
			return cancelled(err);
		i = j;
	}

	/* items: those with a value left (an item whose values all summed to zero is left out) */
	ikeys = aff_alloc_array(a, (size_t) n, sizeof(int64_t));
	fkeys = aff_alloc_array(a, (size_t) (kept > 0 ? kept : 1), sizeof(int64_t));
	if (ikeys == NULL || fkeys == NULL)
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the item profiles");
	n_items = 0;
	for (i = 0; i < kept; i++)
		if (n_items == 0 || ikeys[n_items - 1] != rows[i].user)
			ikeys[n_items++] = rows[i].user;
	if (kept == 0)
		return aff_fail(err, AFF_ERR_INVALID, "every feature value of affinity.item_profiles sums to zero");
	if (n_items > AFF_MAX_ENTITIES)
		return aff_fail(err, AFF_ERR_LIMIT, "too many items for one value");

	/* features in key order, with the number of items holding each */
	for (i = 0; i < kept; i++)
		fkeys[i] = rows[i].item;
	qsort(fkeys, (size_t) kept, sizeof(int64_t), cmp_i64);
	for (i = 0; i < kept; i++)
		if (n_feat == 0 || fkeys[n_feat - 1] != fkeys[i])
			fkeys[n_feat++] = fkeys[i];
	if (n_feat > AFF_MAX_ENTITIES)
		return aff_fail(err, AFF_ERR_LIMIT, "too many features for one value");
	df = aff_alloc_array(a, (size_t) n_feat, sizeof(int32_t));
	remap = aff_alloc_array(a, (size_t) n_feat, sizeof(int32_t));
	if (df == NULL || remap == NULL)
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the item profiles");
	memset(df, 0, sizeof(int32_t) * (size_t) n_feat);
	for (i = 0; i < kept; i++)
	{
		int64_t		f = aff_find_key(fkeys, n_feat, rows[i].item);

		AFF_ASSERT(f >= 0);
		rows[i].pad = (int32_t) f;
		df[f]++;
		if (polled_stop(p, i + 1))
			return cancelled(err);
	}
	for (i = 0; i < n_feat; i++)
		remap[i] = df[i] >= p->min_df ? (int32_t) n_keep++ : -1;
	if (n_keep == 0)
	{
		aff_fail(err, AFF_ERR_INVALID, "no feature is held by at least %d items", p->min_df);
		aff_detail(err, "The rows hold %lld features over %lld items; min_document_frequency is %d.",
				   (long long) n_feat, (long long) n_items, p->min_df);
		return aff_hint(err, "Lower min_document_frequency.");
	}
	for (i = 0; i < kept; i++)
		nnz += remap[rows[i].pad] >= 0;

	kkeys = aff_alloc_array(a, (size_t) n_keep, sizeof(int64_t));
	kdf = aff_alloc_array(a, (size_t) n_keep, sizeof(int32_t));
	ptr = aff_alloc_array(a, (size_t) n_items + 1, sizeof(int64_t));
	fidx = aff_alloc_array(a, (size_t) (nnz > 0 ? nnz : 1), sizeof(int32_t));
	val = aff_alloc_array(a, (size_t) (nnz > 0 ? nnz : 1), sizeof(float));
	info = new_info(a);
	if (kkeys == NULL || kdf == NULL || ptr == NULL || fidx == NULL || val == NULL ||
		info == NULL)
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the item profiles");
	for (i = 0; i < n_feat; i++)
		if (remap[i] >= 0)
		{
			kkeys[remap[i]] = fkeys[i];
			kdf[remap[i]] = df[i];
		}

	/* CSR over the kept features; rows are by item, then feature key */
	{
		int64_t		item = -1;
		int64_t		at = 0;

		for (i = 0; i < kept; i++)
		{
			int32_t		f = remap[rows[i].pad];

			if (item < 0 || rows[i].user != ikeys[item])
				ptr[++item] = at;
			if (f < 0)
				continue;
			fidx[at] = f;
			val[at] = rows[i].weight;
			if (p->normalization == AFF_NORM_TFIDF)
				val[at] = (float) (val[at] * log((double) n_items / (double) kdf[f]));
			at++;
		}
		AFF_ASSERT(item == n_items - 1 && at == nnz);
		ptr[n_items] = at;
	}
	info[AFF_PINFO_EMPTY_ITEMS] = p->normalization == AFF_NORM_NONE ?
		count_empty(ptr, val, n_items, 0) : normalise_rows(ptr, val, n_items, 0);

	if ((st = catalogue_header(parts, n_items, ikeys, a, err)) != AFF_OK)
		return st;
	info[AFF_PINFO_KIND] = AFF_PROFILE_SPARSE;
	info[AFF_PINFO_NORMALIZATION] = p->normalization;
	info[AFF_PINFO_MIN_DF] = p->min_df;
	info[AFF_PINFO_FEATURES] = n_keep;
	info[AFF_PINFO_DROPPED] = n_feat - n_keep;
	info[AFF_PINFO_NONZEROS] = nnz;
	parts->data[AFF_SEC_PROFILE_INFO] = info;
	parts->count[AFF_SEC_PROFILE_INFO] = AFF_PINFO_COUNT;
	parts->data[AFF_SEC_FEATURE_KEYS] = kkeys;
	parts->count[AFF_SEC_FEATURE_KEYS] = (uint64_t) n_keep;
	parts->data[AFF_SEC_FEATURE_ITEMS] = kdf;
	parts->count[AFF_SEC_FEATURE_ITEMS] = (uint64_t) n_keep;
	parts->data[AFF_SEC_PROFILE_PTR] = ptr;
	parts->count[AFF_SEC_PROFILE_PTR] = (uint64_t) n_items + 1;
	parts->data[AFF_SEC_PROFILE_FEATURES] = fidx;
	parts->count[AFF_SEC_PROFILE_FEATURES] = (uint64_t) nnz;
	parts->data[AFF_SEC_PROFILE_VALUES] = val;
	parts->count[AFF_SEC_PROFILE_VALUES] = (uint64_t) nnz;
	aff_release(a, fkeys);
	aff_release(a, df);
	aff_release(a, remap);
	out->n_items = n_items;
	out->n_features = n_keep;
	out->item_keys = ikeys;
	out->feature_keys = kkeys;
	return AFF_OK;
}

/* An index sort of keys: order[] gets 0 .. n-1 by key. */
typedef struct KeyPos
{
	int64_t		key;
	int64_t		pos;
} KeyPos;

static int
cmp_keypos(const void *a, const void *b)
{
	const KeyPos *x = a;
	const KeyPos *y = b;

	if (x->key != y->key)
		return x->key < y->key ? -1 : 1;
	return x->pos < y->pos ? -1 : x->pos > y->pos;
}

/*
 * Dense vectors: n rows of dim floats (vecs row by row, in the order of
 * keys), one per item; an item given twice is AFF_ERR_INVALID with
 * out->dup_key set.
 */
AffStatus
aff_profiles_build_dense(const int64_t *keys, const float *vecs, int64_t n, int dim,
						 const AffProfileParams *p, const AffAllocator *a,
						 AffModelParts *parts, AffProfileBuild *out, AffError *err)
{
	KeyPos	   *kp;
	int64_t	   *ikeys;
	float	   *val;
	int64_t	   *info;
	size_t		cells;
	int64_t		i;
	AffStatus	st;

	memset(out, 0, sizeof(*out));
	if (n < 1)
		return aff_fail(err, AFF_ERR_INVALID, "affinity.item_profiles received no usable rows");
	if (n > AFF_MAX_ENTITIES)
		return aff_fail(err, AFF_ERR_LIMIT, "too many items for one value");
	AFF_ASSERT(dim >= 1 && dim <= AFF_MAX_PROFILE_DIM);
	if (aff_mul_overflows((size_t) n, (size_t) dim, &cells))
		return aff_fail(err, AFF_ERR_LIMIT, "too many vector values for one value");
	kp = aff_alloc_array(a, (size_t) n, sizeof(KeyPos));
	ikeys = aff_alloc_array(a, (size_t) n, sizeof(int64_t));
	val = aff_alloc_array(a, cells, sizeof(float));
	info = new_info(a);
	if (kp == NULL || ikeys == NULL || val == NULL || info == NULL)
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the item profiles");
	for (i = 0; i < n; i++)
	{
		kp[i].key = keys[i];
		kp[i].pos = i;
	}
	qsort(kp, (size_t) n, sizeof(KeyPos), cmp_keypos);
	for (i = 0; i < n; i++)
	{
		if (i > 0 && kp[i].key == kp[i - 1].key)
		{
			out->dup_key = kp[i].key;
			return aff_fail(err, AFF_ERR_INVALID, "an item has two vectors");
		}
		ikeys[i] = kp[i].key;
		memcpy(val + (size_t) i * dim, vecs + (size_t) kp[i].pos * dim, sizeof(float) * dim);
		if (polled_stop(p, i + 1))
			return cancelled(err);
	}
	aff_release(a, kp);
	info[AFF_PINFO_EMPTY_ITEMS] = p->normalization == AFF_NORM_NONE ?
		count_empty(NULL, val, n, dim) : normalise_rows(NULL, val, n, dim);
	if ((st = catalogue_header(parts, n, ikeys, a, err)) != AFF_OK)
		return st;
	info[AFF_PINFO_KIND] = AFF_PROFILE_DENSE;
	info[AFF_PINFO_NORMALIZATION] = p->normalization;
	info[AFF_PINFO_MIN_DF] = 1;
	info[AFF_PINFO_FEATURES] = dim;
	info[AFF_PINFO_NONZEROS] = (int64_t) cells;
	parts->data[AFF_SEC_PROFILE_INFO] = info;
	parts->count[AFF_SEC_PROFILE_INFO] = AFF_PINFO_COUNT;
	parts->data[AFF_SEC_PROFILE_VECTORS] = val;
	parts->count[AFF_SEC_PROFILE_VECTORS] = (uint64_t) cells;
	out->n_items = n;
	out->n_features = dim;
	out->item_keys = ikeys;
	return AFF_OK;
}

static const int64_t *
profile_info(const AffModelView *v)
{
	return (const int64_t *) v->sections[AFF_SEC_PROFILE_INFO];
}

/*
 * Items like item it: cosine of the rows (computed in double), every item
 * of the catalogue, bought or not.  Items whose row is all zeros have no
 * similarity and are no answer, nor (feature rows) items that share no
 * feature of non-zero weight with it, nor it itself.  A row of zeros gets no
 * look-alike at all.
 */
void
aff_profiles_item_row(const AffServe *s, int64_t it, float *sims, uint8_t *skip)
{
	const AffModelView *v = s->v;
	const int64_t *info = profile_info(v);
	int64_t		n = v->h->n_items;
	int64_t		i;
	double		qn = 0;

	if (info[AFF_PINFO_KIND] == AFF_PROFILE_DENSE)
	{
		int			dim = (int) info[AFF_PINFO_FEATURES];
		const float *X = (const float *) v->sections[AFF_SEC_PROFILE_VECTORS];
		const float *q = X + (size_t) it * dim;
		int			d;

		for (d = 0; d < dim; d++)
			qn += (double) q[d] * q[d];
		for (i = 0; i < n; i++)
		{
			const float *x = X + (size_t) i * dim;
			double		dot = 0;
			double		xn = 0;

			for (d = 0; d < dim; d++)
			{
				dot += (double) q[d] * x[d];
				xn += (double) x[d] * x[d];
			}
			skip[i] = xn == 0 || qn == 0;
			sims[i] = skip[i] ? 0.0f : (float) (dot / (sqrt(qn) * sqrt(xn)));
		}
	}
	else
	{
		const int64_t *ptr = (const int64_t *) v->sections[AFF_SEC_PROFILE_PTR];
		const int32_t *fi = (const int32_t *) v->sections[AFF_SEC_PROFILE_FEATURES];
		const float *fv = (const float *) v->sections[AFF_SEC_PROFILE_VALUES];
		int64_t		qa = ptr[it];
		int64_t		qb = ptr[it + 1];
		int64_t		j;

		for (j = qa; j < qb; j++)
			qn += (double) fv[j] * fv[j];
		for (i = 0; i < n; i++)
		{
			int64_t		a = ptr[i];
			int64_t		b = ptr[i + 1];
			int64_t		q = qa;
			double		dot = 0;
			double		xn = 0;

			for (j = a; j < b; j++)
			{
				xn += (double) fv[j] * fv[j];
				while (q < qb && fi[q] < fi[j])
					q++;
				if (q < qb && fi[q] == fi[j])
					dot += (double) fv[q] * fv[j];
			}
			/* no shared feature (or none that weighs): no look-alike */
			skip[i] = xn == 0 || qn == 0 || dot == 0;
			sims[i] = skip[i] ? 0.0f : (float) (dot / (sqrt(qn) * sqrt(xn)));
		}
	}
	skip[it] = 1;
}

static AffStatus
bad_value(AffError *err, const char *what, long long a, long long b)
{
	aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
	return aff_detail(err, "The item profiles' %s (%lld, %lld) are out of range.", what, a, b);
}

/* Index of the first non-finite value of x[0 .. n), or -1. */
static int64_t
first_bad(const float *x, uint64_t n, AffPollFn poll, void *poll_arg, int *stop)
{
	uint64_t	i;

	for (i = 0; i < n; i++)
	{
		if (!isfinite(x[i]))
			return (int64_t) i;
		if ((i % POLL_EVERY) == POLL_EVERY - 1 && poll != NULL && poll(poll_arg))
		{
			*stop = 1;
			return -1;
		}
	}
	return -1;
}

/*
 * The content checks of a profiles value (after the format's own): the
 * header's unused fields, then the profile sections.
 */
static AffStatus
profiles_check(const AffModelView *v, AffPollFn poll, void *poll_arg, AffError *err)
{
	const AffModelHeader *h = v->h;

	if (h->regularization != 0 || h->alpha != 0 || h->epsilon != 0 || h->seed != 0 ||
		!isfinite(h->fit_seconds) || h->fit_seconds < 0)
		return bad_value(err, "header options", 0, 0);
	return aff_profiles_check_sections(v, poll, poll_arg, err);
}

/*
 * profile_info, then the sections its kind needs (and none of the other
 * kind's), their counts and content; shared with the content method,
 * whose values carry the profiles they were fitted on.
 */
AffStatus
aff_profiles_check_sections(const AffModelView *v, AffPollFn poll, void *poll_arg,
							AffError *err)
{
	const AffModelHeader *h = v->h;
	const int64_t *info = profile_info(v);
	const uint64_t *c = v->counts;
	int64_t		n = h->n_items;
	int64_t		F;
	int			stop = 0;
	int			k;
	bool		dense;
	if (info[AFF_PINFO_KIND] != AFF_PROFILE_SPARSE && info[AFF_PINFO_KIND] != AFF_PROFILE_DENSE)
		return bad_value(err, "kind", info[AFF_PINFO_KIND], 0);
	dense = info[AFF_PINFO_KIND] == AFF_PROFILE_DENSE;
	if (info[AFF_PINFO_NORMALIZATION] < AFF_NORM_NONE ||
		info[AFF_PINFO_NORMALIZATION] > (dense ? AFF_NORM_L2 : AFF_NORM_TFIDF))
		return bad_value(err, "normalisation", info[AFF_PINFO_NORMALIZATION], 0);
	if (info[AFF_PINFO_MIN_DF] < 1 || info[AFF_PINFO_MIN_DF] > AFF_MAX_ENTITIES ||
		(dense && info[AFF_PINFO_MIN_DF] != 1) ||
		info[AFF_PINFO_DROPPED] < 0 || info[AFF_PINFO_DROPPED] > AFF_MAX_ENTITIES ||
		(dense && info[AFF_PINFO_DROPPED] != 0))
		return bad_value(err, "document frequency figures", info[AFF_PINFO_MIN_DF],
						 info[AFF_PINFO_DROPPED]);
	if (info[AFF_PINFO_EMPTY_ITEMS] < 0 || info[AFF_PINFO_EMPTY_ITEMS] > n || info[7] != 0)
		return bad_value(err, "empty item count", info[AFF_PINFO_EMPTY_ITEMS], info[7]);
	F = info[AFF_PINFO_FEATURES];
	if (F < 1 || F > (dense ? AFF_MAX_PROFILE_DIM : AFF_MAX_ENTITIES))
		return bad_value(err, "feature count", F, 0);
	for (k = AFF_SEC_FEATURE_KEYS; k <= AFF_SEC_PROFILE_VECTORS; k++)
		if ((v->sections[k] != NULL) != (dense ? k == AFF_SEC_PROFILE_VECTORS
										 : k != AFF_SEC_PROFILE_VECTORS))
			return bad_value(err, "sections of the kind", k, info[AFF_PINFO_KIND]);
	if (dense)
	{
		const float *X = v->sections[AFF_SEC_PROFILE_VECTORS];
		int64_t		bad;

		if (c[AFF_SEC_PROFILE_VECTORS] != (uint64_t) n * (uint64_t) F ||
			info[AFF_PINFO_NONZEROS] != (int64_t) c[AFF_SEC_PROFILE_VECTORS])
			return bad_value(err, "vector counts", (long long) c[AFF_SEC_PROFILE_VECTORS],
							 info[AFF_PINFO_NONZEROS]);
		bad = first_bad(X, c[AFF_SEC_PROFILE_VECTORS], poll, poll_arg, &stop);
		if (stop)
			return cancelled(err);
		if (bad >= 0)
			return bad_value(err, "vector values (item index, position) are not finite and", bad / F, bad % F);
		return AFF_OK;
	}
	{
		const int64_t *fk = v->sections[AFF_SEC_FEATURE_KEYS];
		const int32_t *df = v->sections[AFF_SEC_FEATURE_ITEMS];
		const int64_t *ptr = v->sections[AFF_SEC_PROFILE_PTR];
		const int32_t *fi = v->sections[AFF_SEC_PROFILE_FEATURES];
		const float *fv = v->sections[AFF_SEC_PROFILE_VALUES];
		uint64_t	nnz = c[AFF_SEC_PROFILE_FEATURES];
		int64_t		i;
		int64_t		j;
		int64_t		bad;

		if (c[AFF_SEC_FEATURE_KEYS] != (uint64_t) F || c[AFF_SEC_FEATURE_ITEMS] != (uint64_t) F ||
			c[AFF_SEC_FEATURE_TEXT_OFF] != (uint64_t) F + 1 ||
			(uint64_t) info[AFF_PINFO_NONZEROS] != nnz)
			return bad_value(err, "feature counts", F, (long long) nnz);
		for (i = 1; i < F; i++)
			if (fk[i] <= fk[i - 1])
				return bad_value(err, "feature keys (not ascending at)", i, 0);
		for (i = 0; i < F; i++)
			if (df[i] < 1 || df[i] > n || df[i] < info[AFF_PINFO_MIN_DF])
				return bad_value(err, "document frequencies", i, df[i]);
		if (aff_check_text_keys(h->text_hash_key, fk, F, v->sections[AFF_SEC_FEATURE_TEXT_OFF],
								v->sections[AFF_SEC_FEATURE_TEXT], c[AFF_SEC_FEATURE_TEXT],
								"feature", err) != AFF_OK)
			return err->status;
		if (poll != NULL && poll(poll_arg))
			return cancelled(err);
		if (ptr[0] != 0 || (uint64_t) ptr[n] != nnz)
			return bad_value(err, "row offsets", ptr[0], ptr[n]);
		for (i = 0; i < n; i++)
		{
			if (ptr[i + 1] < ptr[i] || (uint64_t) ptr[i + 1] > nnz)
				return bad_value(err, "row offsets (item index)", i, ptr[i + 1]);
			for (j = ptr[i]; j < ptr[i + 1]; j++)
				if (fi[j] < 0 || fi[j] >= F || (j > ptr[i] && fi[j] <= fi[j - 1]))
					return bad_value(err, "feature indices (item index, feature index)", i, fi[j]);
			if ((i % POLL_EVERY) == POLL_EVERY - 1 && poll != NULL && poll(poll_arg))
				return cancelled(err);
		}
		bad = first_bad(fv, nnz, poll, poll_arg, &stop);
		if (stop)
			return cancelled(err);
		if (bad >= 0)
			return bad_value(err, "values (position) are not finite and", bad, 0);
	}
	return AFF_OK;
}

/* The profile's figures for describe(), as a JSON fragment. */
void
aff_profiles_describe(const AffModelView *v, char *buf, size_t len)
{
	const int64_t *info = profile_info(v);
	bool		dense = info[AFF_PINFO_KIND] == AFF_PROFILE_DENSE;

	snprintf(buf, len,
			 "\"profile\": {\"kind\": \"%s\", \"items\": %lld, \"%s\": %lld, "
			 "\"nonzeros\": %lld, \"normalization\": \"%s\", "
			 "\"min_document_frequency\": %lld, \"features_dropped\": %lld, "
			 "\"items_without_features\": %lld}",
			 dense ? "dense" : "sparse", (long long) v->h->n_items,
			 dense ? "dimension" : "features", (long long) info[AFF_PINFO_FEATURES],
			 (long long) info[AFF_PINFO_NONZEROS],
			 aff_normalization_name((int) info[AFF_PINFO_NORMALIZATION]),
			 (long long) info[AFF_PINFO_MIN_DF], (long long) info[AFF_PINFO_DROPPED],
			 (long long) info[AFF_PINFO_EMPTY_ITEMS]);
}

const AffMethod aff_method_item_profiles = {
	.code = AFF_METHOD_ITEM_PROFILES,
	.name = "item_profiles",
	.sections = (1u << AFF_SEC_PROFILE_INFO) | (1u << AFF_SEC_FEATURE_KEYS) |
	(1u << AFF_SEC_FEATURE_TEXT_OFF) | (1u << AFF_SEC_FEATURE_TEXT) |
	(1u << AFF_SEC_FEATURE_ITEMS) | (1u << AFF_SEC_PROFILE_PTR) |
	(1u << AFF_SEC_PROFILE_FEATURES) | (1u << AFF_SEC_PROFILE_VALUES) |
	(1u << AFF_SEC_PROFILE_VECTORS),
	.options = AFF_OPT_BIT(AFF_OPT_NORMALIZATION) | AFF_OPT_BIT(AFF_OPT_MIN_DF),
	.catalogue = true,
	.item_row = aff_profiles_item_row,
	.check_content = profiles_check,
	.describe = aff_profiles_describe,
};
