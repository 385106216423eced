/*
 * model_cache.c
 *		The per-backend model cache: a model value is read (detoasted) once
 *		and kept, decoded and ready to serve, with the derived data serving
 *		needs (the Gram matrix for fold-in, vector norms for cosine).
 *
 * Identity.  A value's identity is its content digest, the SHA-256 of its
 * content in its header (model_io.c verifies it on every way in and
 * model_build writes it, so no value with a chosen digest can be made; the
 * checksum, a fast hash anyone can steer, is never trusted alone).  Entries
 * of stored values are keyed by the TOAST pointer (toast relation, value
 * id, raw size) plus digest and checksum; values that arrive in memory (a
 * model computed in the same query, a parameter, a value stored inline)
 * by size, digest and checksum.  An in-memory hit is also confirmed by
 * comparing the bytes with the cached copy when the value is small enough
 * to have been stored inline (CONFIRM_BYTES), or has no digest.
 *
 * A value without a digest can only be one stored before the digest
 * existed (input fills it in), i.e. a value this extension made: a TOAST
 * pointer to one names it by its value id, which no other value shares
 * while it exists; another such value could reuse the id only after this
 * one is deleted, vacuumed and the OID counter has wrapped around, and
 * would also need the same raw size and checksum.
 *
 * Within one query the key of a TOAST pointer is read once (a header slice)
 * and remembered in fn_extra; later queries read it again.
 *
 * The cache lives in its own context under TopMemoryContext and is bounded
 * by affinity.model_cache_size (MB), least recently used first out; the
 * entry in use always stays.  Callers never keep an entry across calls:
 * they look it up each call (a short scan), so eviction is always safe.
 */
#include "affinity_pg.h"

#include <math.h>

#include "access/detoast.h"
#include "utils/memutils.h"

#include "../core/serve.h"

#include "../core/als.h"
#include "../core/digest.h"

#define CACHE_MAX_ENTRIES 64

/*
 * In-memory values up to this size are compared byte for byte on a hit.
 * It covers every value that can be stored inline in a row, where a value
 * from before this version could carry anything in its digest field: an
 * inline datum is under 2 kB compressed, which neither pglz nor lz4 expands
 * past about 0.5 MB.
 */
#define CONFIRM_BYTES ((Size) 1024 * 1024)

int			affinity_model_cache_size_mb = 256;

static MemoryContext cache_cxt = NULL;
static CachedModel *entries[CACHE_MAX_ENTRIES];
static int	n_entries = 0;
static uint64 use_clock = 0;
static Size cache_bytes = 0;
static int64 cache_hits = 0;
static int64 cache_loads = 0;

/* The identity read from a value's header. */
typedef struct ModelKey
{
	uint64		checksum;
	uint8		digest[AFF_SHA256_BYTES];
} ModelKey;

/* What fn_extra remembers: the key read for this query's pointer. */
typedef struct QueryKey
{
	Oid			toastrelid;
	Oid			valueid;
	int32		rawsize;
	ModelKey	key;
	bool		valid;
} QueryKey;

/*
 * The entry for (toastrelid, valueid, size, key).  For an in-memory value
 * (v not NULL) a candidate must also hold the same bytes when v is small
 * or has no digest.
 */
static CachedModel *
lookup(Oid toastrelid, Oid valueid, uint64 size, const ModelKey *key,
	   const struct varlena *v)
{
	int			i;

	for (i = 0; i < n_entries; i++)
	{
		CachedModel *e = entries[i];

		if (e->toastrelid != toastrelid || e->valueid != valueid ||
			e->size != size || e->checksum != key->checksum ||
			memcmp(e->digest, key->digest, AFF_SHA256_BYTES) != 0)
			continue;
		if (v != NULL && (size <= CONFIRM_BYTES || !e->has_digest) &&
			memcmp(e->value, v, size) != 0)
			continue;
		return e;
	}
	return NULL;
}

static void
free_entry(int i)
{
	CachedModel *e = entries[i];

	cache_bytes -= e->bytes;
	MemoryContextDelete(e->cxt);
	entries[i] = entries[--n_entries];
}

/* Evict least recently used entries until `need` more bytes fit. */
static void
make_room(Size need)
{
	Size		limit = (Size) affinity_model_cache_size_mb * 1024 * 1024;

	while (n_entries > 0 &&
		   (n_entries >= CACHE_MAX_ENTRIES || cache_bytes + need > limit))
	{
		int			oldest = 0;
		int			i;

		for (i = 1; i < n_entries; i++)
			if (entries[i]->last_used < entries[oldest]->last_used)
				oldest = i;
		free_entry(oldest);
	}
}

/*
 * Drop least recently used entries other than keep while the cache is over
 * its limit (the limit may have been lowered since they were loaded).
 */
static void
trim(CachedModel *keep)
{
	Size		limit = (Size) affinity_model_cache_size_mb * 1024 * 1024;

	while (cache_bytes > limit && n_entries > 1)
	{
		int			oldest = -1;
		int			i;

		for (i = 0; i < n_entries; i++)
			if (entries[i] != keep &&
				(oldest < 0 || entries[i]->last_used < entries[oldest]->last_used))
				oldest = i;
		free_entry(oldest);
	}
}

/*
 * Add a copy of the detoasted value v under the given key.  The copy is
 * made first into the entry's own context, so an error leaves the cache as
 * it was.
 */
static CachedModel *
insert(Oid toastrelid, Oid valueid, const struct varlena *v, const ModelKey *key)
{
	Size		size = VARSIZE(v);
	MemoryContext cxt;
	CachedModel *e;
	AffError	err;

	if (cache_cxt == NULL)
		cache_cxt = AllocSetContextCreate(TopMemoryContext, "affinity model cache",
										  ALLOCSET_DEFAULT_SIZES);
	make_room(size);
	cxt = AllocSetContextCreate(cache_cxt, "affinity cached model",
								ALLOCSET_DEFAULT_SIZES);
	PG_TRY();
	{
		e = MemoryContextAllocZero(cxt, sizeof(CachedModel));
		e->value = MemoryContextAllocHuge(cxt, size);
		memcpy(e->value, v, size);
		if (aff_model_view((const uint8 *) e->value, size, &e->view, &err) != AFF_OK)
			report_engine_error(&err);
	}
	PG_CATCH();
	{
		MemoryContextDelete(cxt);
		PG_RE_THROW();
	}
	PG_END_TRY();
	e->cxt = cxt;
	e->toastrelid = toastrelid;
	e->valueid = valueid;
	e->size = size;
	e->checksum = key->checksum;
	memcpy(e->digest, key->digest, AFF_SHA256_BYTES);
	e->has_digest = !aff_model_digest_unset((const uint8 *) e->value);
	e->bytes = size;
	entries[n_entries++] = e;
	cache_bytes += size;
	cache_loads++;
	return e;
}

/* The identity in the header of a value (after a size check). */
static void
header_key(const struct varlena *v, ModelKey *key)
{
	AffModelHeader h;

	if (VARSIZE(v) < sizeof(AffModelHeader))
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_BINARY_REPRESENTATION),
				 errmsg("invalid affinity.model value"),
				 errdetail("The value has %u bytes, fewer than a model header.",
						   (unsigned) VARSIZE(v))));
	memcpy(&h, v, sizeof(h));
	key->checksum = h.checksum;
	memcpy(key->digest, h.content_digest, AFF_SHA256_BYTES);
}

/* Read a TOAST pointer's header slice and its identity. */
static void
toasted_key(struct varlena *raw, ModelKey *key)
{
	struct varlena *slice = detoast_attr_slice(raw, 0, sizeof(AffModelHeader));

	header_key(slice, key);
	pfree(slice);
}

/*
 * The cached, viewable model of argument argno (not NULL).  Loads it on a
 * miss.  The result is valid until the next call into the cache.
 */
CachedModel *
model_get(FunctionCallInfo fcinfo, int argno)
{
	struct varlena *raw = (struct varlena *) PG_GETARG_RAW_VARLENA_P(argno);
	CachedModel *e;

	if (VARATT_IS_EXTERNAL_ONDISK(raw))
	{
		struct varatt_external ptr;
		QueryKey   *qk = (QueryKey *) fcinfo->flinfo->fn_extra;

		VARATT_EXTERNAL_GET_POINTER(ptr, raw);
		if (qk == NULL)
		{
			qk = MemoryContextAllocZero(fcinfo->flinfo->fn_mcxt, sizeof(QueryKey));
			fcinfo->flinfo->fn_extra = qk;
		}
		if (!qk->valid || qk->toastrelid != ptr.va_toastrelid ||
			qk->valueid != ptr.va_valueid || qk->rawsize != ptr.va_rawsize)
		{
			qk->valid = false;
			qk->toastrelid = ptr.va_toastrelid;
			qk->valueid = ptr.va_valueid;
			qk->rawsize = ptr.va_rawsize;
			toasted_key(raw, &qk->key);
			qk->valid = true;
		}
		e = lookup(qk->toastrelid, qk->valueid, qk->rawsize, &qk->key, NULL);
		if (e == NULL)
		{
			struct varlena *v = detoast_attr(raw);

			e = insert(qk->toastrelid, qk->valueid, v, &qk->key);
			pfree(v);
		}
		else
			cache_hits++;
	}
	else
	{
		struct varlena *v = (struct varlena *) PG_DETOAST_DATUM(PointerGetDatum(raw));
		ModelKey	key;

		header_key(v, &key);
		e = lookup(InvalidOid, InvalidOid, VARSIZE(v), &key, v);
		if (e == NULL)
			e = insert(InvalidOid, InvalidOid, v, &key);
		else
			cache_hits++;
	}
	e->last_used = ++use_clock;
	trim(e);
	check_catalogue_call(fcinfo, &e->view);
	return e;
}

/* Convenience: just the view. */
void
model_fetch(FunctionCallInfo fcinfo, int argno, AffModelView *view)
{
	*view = model_get(fcinfo, argno)->view;
}

/* Y^T Y of an implicit_als model, computed once per cached entry. */
const double *
cached_gram(CachedModel *e)
{
	const AffModelView *v = &e->view;
	int			f = v->h->factors;

	if (e->gram == NULL)
	{
		float	   *gf = MemoryContextAllocHuge(e->cxt, sizeof(float) * f * f);
		double	   *g = MemoryContextAllocHuge(e->cxt, sizeof(double) * f * f);

		aff_gram(v->item_factors, v->h->n_items, f, 1, gf, g);
		pfree(gf);
		e->gram = g;
		e->bytes += sizeof(double) * f * f;
		cache_bytes += sizeof(double) * f * f;
	}
	return e->gram;
}

static float *
norms_of(CachedModel *e, const float *F, int64 n)
{
	int			f = e->view.h->factors;
	float	   *out = MemoryContextAllocHuge(e->cxt, sizeof(float) * n);

	aff_row_norms(F, n, f, out);
	e->bytes += sizeof(float) * n;
	cache_bytes += sizeof(float) * n;
	return out;
}

/* Euclidean norms of the item (or user) vectors, computed once per entry. */
const float *
cached_norms(CachedModel *e, bool users)
{
	if (users && e->user_norms == NULL)
		e->user_norms = norms_of(e, e->view.user_factors, e->view.h->n_users);
	if (!users && e->item_norms == NULL)
		e->item_norms = norms_of(e, e->view.item_factors, e->view.h->n_items);
	return users ? e->user_norms : e->item_norms;
}

/* Cache figures for affinity.runtime(). */
void
cache_stats(int *entries_out, int64 *bytes, int64 *hits, int64 *loads)
{
	*entries_out = n_entries;
	*bytes = (int64) cache_bytes;
	*hits = cache_hits;
	*loads = cache_loads;
}
