/*
 * model_io.c
 *		The affinity.model type: text and binary I/O, building values from
 *		engine output, and fetching them for the serving functions.
 *
 * Text form: base64 of the value's bytes after the varlena length word
 * (4/3 of the binary size, so a plain pg_dump carries models up to about
 * 750 MB).  Binary form: the same bytes.  Both ways in run the engine's
 * full validation.
 */
#include "affinity_pg.h"

#include <ctype.h>

#include "common/base64.h"
#include "libpq/pqformat.h"
#include "miscadmin.h"
#include "utils/memutils.h"

/* Largest value we build: a varlena holds at most 1 GB. */
#define MODEL_MAX_BYTES ((uint64) 0x3FFFFFFF)

static void *
context_alloc(void *ctx, size_t size)
{
	return MemoryContextAllocExtended((MemoryContext) ctx, size,
									  MCXT_ALLOC_HUGE | MCXT_ALLOC_NO_OOM);
}

static void
context_release(void *ctx, void *ptr)
{
	(void) ctx;
	pfree(ptr);
}

/* An engine allocator that allocates in cxt and returns NULL on failure. */
AffAllocator
context_allocator(MemoryContext cxt)
{
	AffAllocator a;

	a.alloc = context_alloc;
	a.release = context_release;
	a.ctx = cxt;
	return a;
}

/* Raise the engine's error with the matching SQLSTATE. */
void
report_engine_error(const AffError *err)
{
	int			code;

	switch (err->status)
	{
		case AFF_ERR_NOMEM:
			code = ERRCODE_OUT_OF_MEMORY;
			break;
		case AFF_ERR_CANCELLED:
			code = ERRCODE_QUERY_CANCELED;
			break;
		case AFF_ERR_INVALID:
			code = ERRCODE_DATA_EXCEPTION;
			break;
		case AFF_ERR_CORRUPT:
			code = ERRCODE_INVALID_BINARY_REPRESENTATION;
			break;
		case AFF_ERR_LIMIT:
			code = ERRCODE_PROGRAM_LIMIT_EXCEEDED;
			break;
		case AFF_ERR_NUMERIC:
			code = ERRCODE_NUMERIC_VALUE_OUT_OF_RANGE;
			break;
		default:
			code = ERRCODE_INTERNAL_ERROR;
	}
	ereport(ERROR,
			(errcode(code),
			 errmsg("%s", err->msg),
			 err->detail[0] ? errdetail("%s", err->detail) : 0));
	pg_unreachable();
}

/*
 * Poll callback for the engine: stop when the backend must cancel or die.
 * Only reads flags, so it is safe while workers run.
 */
int
engine_poll(void *arg)
{
	(void) arg;
	return QueryCancelPending || ProcDiePending;
}

/*
 * Raise the engine's error for rc (nothing for AFF_OK).  A cancellation
 * becomes the pending interrupt, raised on the backend's own stack.
 */
void
engine_check(AffStatus rc, const AffError *err)
{
	if (rc == AFF_OK)
		return;
	if (rc == AFF_ERR_CANCELLED)
	{
		CHECK_FOR_INTERRUPTS();
		ereport(ERROR,
				(errcode(ERRCODE_QUERY_CANCELED),
				 errmsg("affinity was interrupted")));
	}
	report_engine_error(err);
}

/* Seconds since start, for timings kept in the model. */
double
seconds_since(instr_time start)
{
	instr_time	now;

	INSTR_TIME_SET_CURRENT(now);
	INSTR_TIME_SUBTRACT(now, start);
	return INSTR_TIME_GET_DOUBLE(now);
}

/* Encode parts into a new varlena in CurrentMemoryContext. */
bytea *
model_build(const AffModelParts *parts)
{
	AffError	err;
	uint64		size;
	bytea	   *v;

	if (aff_model_size(parts, &size, &err) != AFF_OK)
		report_engine_error(&err);
	if (size > MODEL_MAX_BYTES)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("model is too large for one value"),
				 errdetail("It needs " UINT64_FORMAT " bytes; a value holds at most 1 GB.", size),
				 errhint("Use fewer factors, or filter rare users and items with min_user_interactions and min_item_interactions.")));
	v = (bytea *) palloc_extended(size, MCXT_ALLOC_HUGE);
	aff_model_write(parts, (uint8 *) v, size);
	SET_VARSIZE(v, size);
	return v;
}

/* Copy len bytes after a fresh varlena word and validate the result. */
static bytea *
model_from_bytes(const char *data, int len)
{
	bytea	   *v;
	AffModelView view;
	AffError	err;

	if (len < (int) sizeof(AffModelHeader) - 4)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_BINARY_REPRESENTATION),
				 errmsg("invalid affinity.model value"),
				 errdetail("The value has %d bytes, fewer than a model header.", len)));
	v = (bytea *) palloc(len + 4);
	SET_VARSIZE(v, len + 4);
	memcpy((char *) v + 4, data, len);
	if (aff_model_validate((const uint8 *) v, len + 4, &view, &err) != AFF_OK)
		report_engine_error(&err);
	return v;
}

PG_FUNCTION_INFO_V1(model_in);

Datum
model_in(PG_FUNCTION_ARGS)
{
	char	   *in = PG_GETARG_CSTRING(0);
	char	   *text = palloc(strlen(in) + 1);
	int			tlen = 0;
	int			cap;
	char	   *raw;
	int			n;
	char	   *c;

	/* line breaks and blanks, as wrapped base64 has, are ignored */
	for (c = in; *c; c++)
		if (!isspace((unsigned char) *c))
			text[tlen++] = *c;
	text[tlen] = '\0';
	cap = pg_b64_dec_len(tlen);
	raw = palloc(cap + 1);
	n = pg_b64_decode(text, tlen, raw, cap);

	if (n < 0)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_TEXT_REPRESENTATION),
				 errmsg("invalid input syntax for type affinity.model"),
				 errdetail("The text is not valid base64 (%d characters).", tlen),
				 errhint("A model's text form is what its output gives, for example in pg_dump.")));
	PG_RETURN_POINTER(model_from_bytes(raw, n));
}

PG_FUNCTION_INFO_V1(model_out);

Datum
model_out(PG_FUNCTION_ARGS)
{
	bytea	   *v = PG_GETARG_BYTEA_PP(0);
	int			len = VARSIZE_ANY_EXHDR(v);
	int			cap = pg_b64_enc_len(len);
	char	   *out = palloc(cap + 1);
	int			n = pg_b64_encode(VARDATA_ANY(v), len, out, cap);

	if (n < 0)
		elog(ERROR, "could not encode affinity.model as base64");
	out[n] = '\0';
	PG_RETURN_CSTRING(out);
}

PG_FUNCTION_INFO_V1(model_recv);

Datum
model_recv(PG_FUNCTION_ARGS)
{
	StringInfo	buf = (StringInfo) PG_GETARG_POINTER(0);
	int			len = buf->len - buf->cursor;
	const char *data = pq_getmsgbytes(buf, len);
	bytea	   *v = model_from_bytes(data, len);

	pq_getmsgend(buf);
	PG_RETURN_POINTER(v);
}

PG_FUNCTION_INFO_V1(model_send);

Datum
model_send(PG_FUNCTION_ARGS)
{
	bytea	   *v = PG_GETARG_BYTEA_PP(0);
	StringInfoData buf;

	pq_begintypsend(&buf);
	pq_sendbytes(&buf, VARDATA_ANY(v), VARSIZE_ANY_EXHDR(v));
	PG_RETURN_BYTEA_P(pq_endtypsend(&buf));
}
