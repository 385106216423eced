/*
 * erase.c
 *		affinity.forget_user: a copy of a model without one user.
 *
 * The copy drops the user's key, vector and training list, and takes the
 * user out of the popularity counts.  Item factors and item-item weights
 * stay as they were: they were learned with the user's data, and only a
 * refit without the user's rows removes that influence (README).
 */
#include "affinity_pg.h"

#include "miscadmin.h"
#include "catalog/pg_type.h"
#include "mb/pg_wchar.h"
#include "utils/builtins.h"

#include "serving_common.h"

#include "../core/interactions.h"

/*
 * Bytes copied between two looks for a cancel: a section of a model may
 * hold hundreds of megabytes.
 */
#define COPY_CHUNK	((Size) 16 * 1024 * 1024)

/* memcpy in chunks of COPY_CHUNK with CHECK_FOR_INTERRUPTS between them. */
static void
copy_chunked(char *dst, const char *src, Size n)
{
	while (n > COPY_CHUNK)
	{
		memcpy(dst, src, COPY_CHUNK);
		dst += COPY_CHUNK;
		src += COPY_CHUNK;
		n -= COPY_CHUNK;
		CHECK_FOR_INTERRUPTS();
	}
	memcpy(dst, src, n);
}

/* Copy arrays of elem bytes without the range [skip_from, skip_to). */
static void *
copy_without(const void *src, int64 n, size_t elem, int64 skip_from, int64 skip_to)
{
	char	   *dst = palloc_extended(elem * Max(n - (skip_to - skip_from), 1), MCXT_ALLOC_HUGE);

	copy_chunked(dst, src, elem * skip_from);
	copy_chunked(dst + elem * skip_from, (const char *) src + elem * skip_to, elem * (n - skip_to));
	return dst;
}

/* Offsets per user without user u's entry: later ones shift down by its span. */
static int64 *
offsets_without(const int64 *off, int64 n_users, int64 u)
{
	int64	   *out = palloc_extended(sizeof(int64) * n_users, MCXT_ALLOC_HUGE);
	int64		span = off[u + 1] - off[u];
	int64		j;

	for (j = 0; j < n_users; j++)
	{
		out[j] = j < u ? off[j] : off[j + 1] - span;
		if ((j & (COPY_CHUNK / sizeof(int64) - 1)) == 0)
			CHECK_FOR_INTERRUPTS();
	}
	return out;
}

/*
 * Section k of the copy, as the section table says forget_user treats it;
 * *count gets its element count.
 */
static const void *
forget_section(const AffModelView *v, int k, int64 u, uint64 *count)
{
	const AffSectionDef *d = &aff_section_defs[k];
	const AffModelHeader *h = v->h;
	const void *src = v->sections[k];
	uint64		n = v->counts[k];
	int64		lo = v->seen_ptr[u];
	int64		hi = v->seen_ptr[u + 1];
	float	   *pop;
	int64		j;

	*count = n;
	switch (d->forget)
	{
		case AFF_FORGET_KEEP:
			return src;
		case AFF_FORGET_CUT_USER:
			*count = n - 1;
			return copy_without(src, n, d->elem_size, u, u + 1);
		case AFF_FORGET_CUT_USER_ROW:
			*count = n - h->factors;
			return copy_without(src, n, d->elem_size, u * h->factors, (u + 1) * h->factors);
		case AFF_FORGET_CUT_USER_SPAN:
			{
				uint64		span = n / (uint64) h->n_users;

				*count = n - span;
				return copy_without(src, n, d->elem_size, u * span, (u + 1) * span);
			}
		case AFF_FORGET_CUT_SEEN:
			*count = n - (hi - lo);
			return copy_without(src, n, d->elem_size, lo, hi);
		case AFF_FORGET_CUT_TEXT:
			*count = n - (v->user_text_off[u + 1] - v->user_text_off[u]);
			return copy_without(src, n, 1, v->user_text_off[u], v->user_text_off[u + 1]);
		case AFF_FORGET_CUT_OFFSETS:
			*count = n - 1;
			return offsets_without(src, h->n_users, u);
		case AFF_FORGET_UNCOUNT:
			pop = palloc_extended(sizeof(float) * n, MCXT_ALLOC_HUGE);
			copy_chunked((char *) pop, src, sizeof(float) * n);
			for (j = lo; j < hi; j++)
				pop[v->seen_items[j]] = Max(pop[v->seen_items[j]] - 1.0f, 0.0f);
			return pop;
	}
	elog(ERROR, "unknown forget rule for section kind %d", k);
	return NULL;
}

PG_FUNCTION_INFO_V1(affinity_forget_user);

/* The user key of argument argno for a message: bigint, or text quoted and cut. */
static char *
user_for_message(FunctionCallInfo fcinfo, int argno)
{
	text	   *t;
	int			len;
	int			cut;

	if (get_fn_expr_argtype(fcinfo->flinfo, argno) != TEXTOID)
		return psprintf(INT64_FORMAT, PG_GETARG_INT64(argno));
	t = PG_GETARG_TEXT_PP(argno);
	len = VARSIZE_ANY_EXHDR(t);
	cut = pg_mbcliplen(VARDATA_ANY(t), len, 64);
	return psprintf("%s%s", quote_literal_cstr(pnstrdup(VARDATA_ANY(t), cut)),
					cut < len ? "..." : "");
}

/*
 * forget_user(model, user_id) -> model: every section through the section
 * table's forget rule, the header's counts reduced.
 */
Datum
affinity_forget_user(PG_FUNCTION_ARGS)
{
	AffModelView v;
	AffModelParts parts;
	const AffModelHeader *h;
	int64		u;
	int			k;

	model_fetch(fcinfo, 0, &v);
	h = v.h;
	u = key_arg_index(fcinfo, 1, &v, true);
	if (u < 0)
	{
		/* said, not raised: erasing a user who was never fitted is done */
		ereport(NOTICE,
				(errmsg("user %s is not in the model: it is returned unchanged",
						user_for_message(fcinfo, 1)),
				 errdetail("The model holds no vector and no training items of this user.")));
		PG_RETURN_DATUM(PG_GETARG_DATUM(0));
	}
	if (h->n_users == 1)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("cannot forget the only user of a model"),
				 errdetail("The user asked for is the model's one user."),
				 errhint("Drop the model instead.")));

	memset(&parts, 0, sizeof(parts));
	parts.h = *h;
	parts.h.n_users = h->n_users - 1;
	parts.h.nnz = h->nnz - (v.seen_ptr[u + 1] - v.seen_ptr[u]);
	for (k = 1; k <= AFF_SEC_MAX; k++)
		if (v.sections[k] != NULL)
			parts.data[k] = forget_section(&v, k, u, &parts.count[k]);
	PG_RETURN_POINTER(model_build(&parts));
}
