/*
 * inspect.c
 *		Looking into a model: the vector exports and describe().
 */
#include "serving_common.h"

#include "access/detoast.h"
#include "funcapi.h"
#include "lib/stringinfo.h"
#include "miscadmin.h"
#include "utils/float.h"

#include "../core/profiles.h"

/*
 * The vectors of one side and their length: the factors, or for a content
 * model's users their preference vectors over the profiles' features.
 */
static const float *
side_vectors(const AffModelView *v, bool users, const char *fn, int *dim)
{
	if (users && v->h->method == AFF_METHOD_CONTENT)
	{
		*dim = (int) ((const int64 *) v->sections[AFF_SEC_PROFILE_INFO])[AFF_PINFO_FEATURES];
		return v->sections[AFF_SEC_USER_PROFILES];
	}
	require_factors(v, fn);
	*dim = v->h->factors;
	return users ? v->user_factors : v->item_factors;
}

/* Shared body of user_vector and item_vector. */
static Datum
one_vector(FunctionCallInfo fcinfo, bool users)
{
	AffModelView v;
	int64		j;
	int			dim;
	const float *F;

	model_fetch(fcinfo, 0, &v);
	F = side_vectors(&v, users, users ? "user_vector" : "item_vector", &dim);
	j = key_arg_index(fcinfo, 1, &v, users);
	if (j < 0)
		PG_RETURN_NULL();
	PG_RETURN_ARRAYTYPE_P(vector_array(F + (size_t) j * dim, dim));
}

/* Shared body of user_vectors and item_vectors. */
static Datum
all_vectors(FunctionCallInfo fcinfo, bool users)
{
	AffModelView v;
	int64		n;
	int32	   *list = NULL;
	int			n_list = 0;
	const float *F;
	int			dim;
	int64		r;

	materialize(fcinfo);
	if (PG_ARGISNULL(0))
		return (Datum) 0;
	model_fetch(fcinfo, 0, &v);
	check_output_keys(fcinfo, &v, 0, users);
	F = side_vectors(&v, users, users ? "user_vectors" : "item_vectors", &dim);
	/* the text overloads take a list of keys (NULL: all) */
	if (PG_NARGS() > 1 && !PG_ARGISNULL(1))
		list = array_key_indices(fcinfo, 1, &v, users, &n_list);
	n = list ? n_list : (users ? v.h->n_users : v.h->n_items);
	for (r = 0; r < n; r++)
	{
		Datum		values[2];
		int64		j = list ? list[r] : r;

		CHECK_FOR_INTERRUPTS();
		values[0] = key_datum(&v, users, j);
		values[1] = PointerGetDatum(vector_array(F + (size_t) j * dim, dim));
		put_row(fcinfo, values);
	}
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(affinity_user_vector);
Datum
affinity_user_vector(PG_FUNCTION_ARGS)
{
	return one_vector(fcinfo, true);
}

PG_FUNCTION_INFO_V1(affinity_item_vector);
Datum
affinity_item_vector(PG_FUNCTION_ARGS)
{
	return one_vector(fcinfo, false);
}

PG_FUNCTION_INFO_V1(affinity_user_vectors);
Datum
affinity_user_vectors(PG_FUNCTION_ARGS)
{
	return all_vectors(fcinfo, true);
}

PG_FUNCTION_INFO_V1(affinity_item_vectors);
Datum
affinity_item_vectors(PG_FUNCTION_ARGS)
{
	return all_vectors(fcinfo, false);
}

static void
append_doubles(StringInfo s, const char *key, const double *x, int64 n)
{
	int64		i;

	appendStringInfo(s, ", \"%s\": [", key);
	for (i = 0; i < n; i++)
		appendStringInfo(s, "%s%s", i ? ", " : "", float8out_internal(x[i]));
	appendStringInfoString(s, "]");
}

/*
 * Read n bytes at offset off of a stored value: a slice read for a TOAST
 * pointer, so describe() fetches only the chunks it needs.
 */
static void
read_part(struct varlena *raw, uint64 total, uint64 off, uint64 n, void *dst)
{
	if (off > total || n > total - off)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_BINARY_REPRESENTATION),
				 errmsg("invalid affinity.model value"),
				 errdetail("A section at byte " UINT64_FORMAT " runs past the end (" UINT64_FORMAT ").",
						   off, total)));
	if (VARATT_IS_EXTERNAL_ONDISK(raw))
	{
		struct varlena *slice = detoast_attr_slice(raw, (int32) off, (int32) n);

		if (VARSIZE_ANY_EXHDR(slice) != n)
			elog(ERROR, "short slice of an affinity.model value");
		memcpy(dst, VARDATA_ANY(slice), n);
		pfree(slice);
	}
	else
		memcpy(dst, (char *) raw + off, n);
}

/*
 * The header, section table (into table, AFF_SEC_MAX entries of room) and
 * the two per-sweep arrays of argument 0, read without fetching the factors.  Offsets count from the start of the
 * value; a slice of a TOAST pointer counts from the first data byte, hence
 * the VARHDRSZ shift.
 */
static void
read_summary(FunctionCallInfo fcinfo, AffModelHeader *h, AffSection *table,
			 double **loss, double **secs, int64 *n_sweeps)
{
	struct varlena *raw = (struct varlena *) PG_GETARG_RAW_VARLENA_P(0);
	struct varlena *v = raw;
	int			shift = VARHDRSZ;
	uint64		total;
	int			i;

	if (!VARATT_IS_EXTERNAL_ONDISK(raw))
	{
		v = (struct varlena *) PG_DETOAST_DATUM(PointerGetDatum(raw));
		shift = 0;
		total = VARSIZE(v);
	}
	else
	{
		struct varatt_external ptr;

		VARATT_EXTERNAL_GET_POINTER(ptr, raw);
		total = ptr.va_rawsize;
	}
	if (total < sizeof(AffModelHeader))
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_BINARY_REPRESENTATION),
				 errmsg("invalid affinity.model value"),
				 errdetail("The value has " UINT64_FORMAT " bytes, fewer than a model header.", total)));
	read_part(v, total, 4 - (shift ? 4 : 0), sizeof(AffModelHeader) - 4, (char *) h + 4);
	if (memcmp(h->magic, AFF_MAGIC, 4) != 0 || h->n_sections > AFF_SEC_MAX ||
		h->total_size != total)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_BINARY_REPRESENTATION),
				 errmsg("invalid affinity.model value"),
				 errdetail("The header is damaged.")));
	read_part(v, total, sizeof(AffModelHeader) - (shift ? 4 : 0),
			  sizeof(AffSection) * h->n_sections, table);
	*loss = *secs = NULL;
	*n_sweeps = 0;
	for (i = 0; i < h->n_sections; i++)
	{
		double	  **dst = table[i].kind == AFF_SEC_LOSS ? loss :
			table[i].kind == AFF_SEC_SWEEP_SECONDS ? secs : NULL;

		if (dst == NULL || table[i].count > 1000000)
			continue;
		*dst = palloc(sizeof(double) * (table[i].count + 1));
		read_part(v, total, table[i].offset - (shift ? 4 : 0),
				  sizeof(double) * table[i].count, *dst);
		*n_sweeps = (int64) table[i].count;
	}
}

/*
 * The value's sections by name, from the section table of the format:
 * "sections": {"user_keys": {"count": n, "bytes": b}, ...}.  Kinds outside
 * the table (a damaged header read by slices) are left out.
 */
static void
describe_sections(StringInfo s, const AffModelHeader *h, const AffSection *table)
{
	int			i;
	bool		first = true;

	appendStringInfoString(s, ", \"sections\": {");
	for (i = 0; i < h->n_sections; i++)
	{
		const AffSection *t = &table[i];

		if (t->kind < 1 || t->kind > AFF_SEC_MAX || aff_section_defs[t->kind].name == NULL)
			continue;
		appendStringInfo(s, "%s\"%s\": {\"count\": " UINT64_FORMAT ", \"bytes\": " UINT64_FORMAT "}",
						 first ? "" : ", ", aff_section_defs[t->kind].name,
						 (uint64) t->count, (uint64) t->count * aff_section_defs[t->kind].elem_size);
		first = false;
	}
	appendStringInfoString(s, "}");
}

/* The method's own figures (item_profiles: features, non-zeros, normalisation). */
static void
describe_method(StringInfo s, FunctionCallInfo fcinfo, const AffMethod *meth)
{
	AffModelView v;
	char		buf[1024];

	model_fetch(fcinfo, 0, &v);
	meth->describe(&v, buf, sizeof(buf));
	appendStringInfo(s, ", %s", buf);
}

PG_FUNCTION_INFO_V1(affinity_describe);

/* describe(model) -> jsonb, from the header and per-sweep arrays only */
Datum
affinity_describe(PG_FUNCTION_ARGS)
{
	AffModelHeader hd;
	const AffModelHeader *h = &hd;
	AffSection	table[AFF_SEC_MAX];
	double	   *loss;
	double	   *secs;
	int64		n_sweeps;
	StringInfoData s;

	read_summary(fcinfo, &hd, table, &loss, &secs, &n_sweeps);
	initStringInfo(&s);
	appendStringInfo(&s, "{\"format_version\": %d, \"method\": \"%s\", \"key_type\": \"%s\", "
					 "\"users\": " INT64_FORMAT ", \"items\": " INT64_FORMAT
					 ", \"interactions\": " INT64_FORMAT,
					 h->version, aff_method_name(h->method),
					 aff_keys_name(h->key_type),
					 h->n_users, h->n_items, h->nnz);
	describe_options(&s, h);
	appendStringInfo(&s, ", \"rows_read\": " INT64_FORMAT ", \"rows_skipped_null\": " INT64_FORMAT
					 ", \"rows_skipped_zero\": " INT64_FORMAT ", \"duplicates_summed\": " INT64_FORMAT
					 ", \"dropped_users\": " INT64_FORMAT ", \"dropped_items\": " INT64_FORMAT
					 ", \"dropped_interactions\": " INT64_FORMAT,
					 h->rows_read, h->rows_skipped_null, h->rows_skipped_zero,
					 h->duplicates_summed, h->dropped_users, h->dropped_items,
					 h->dropped_interactions);
	append_doubles(&s, "loss", loss, loss ? n_sweeps : 0);
	append_doubles(&s, "sweep_seconds", secs, secs ? n_sweeps : 0);
	describe_sections(&s, h, table);
	{
		const AffMethod *meth = aff_method_by_code(h->method);

		if (meth != NULL && meth->describe != NULL)
			describe_method(&s, fcinfo, meth);
	}
	appendStringInfo(&s, ", \"fit_seconds\": %s, \"peak_memory_bytes\": " INT64_FORMAT
					 ", \"size_bytes\": " UINT64_FORMAT
					 ", \"checksum\": \"%016llx\", \"fingerprint\": \"%016llx\"}",
					 float8out_internal(h->fit_seconds), h->peak_memory, h->total_size,
					 (unsigned long long) h->checksum,
					 (unsigned long long) h->fingerprint);
	PG_RETURN_JSONB_P(jsonb_from_cstring(s.data));
}
