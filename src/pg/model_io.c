/*
 * model_io.c
 *		The affinity.model type: text and binary I/O, building values from
 *		engine output, and fetching them for the serving functions.
 *
 * Text form: base64 of the value's bytes after the varlena length word,
 * 4/3 of the binary size.  Binary form: the same bytes.  No value over
 * AFF_MAX_MODEL_BYTES is built or accepted, so the text form of every
 * value fits PostgreSQL's 1 GB string limit, as pg_dump needs.
 *
 * Every way in (text input, binary receive) and every value built here
 * passes the same checks: the engine's full validation, the text keys
 * against the database encoding, and the content digest (SHA-256), which
 * the serving cache uses as the value's identity.  A value from before the
 * digest existed (its digest field is zero) gets one on its way in.
 */
#include "affinity_pg.h"

#include "libpq/pqformat.h"
#include "mb/pg_wchar.h"
#include "miscadmin.h"
#include "utils/memutils.h"

#include "../core/digest.h"

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

/* Raise the engine's error with the matching SQLSTATE, its detail and hint. */
void
report_engine_error(const AffError *err)
{
	int			code;

	switch (err->status)
	{
		case AFF_ERR_OPTION:
			code = ERRCODE_INVALID_PARAMETER_VALUE;
			break;
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
			 err->detail[0] ? errdetail("%s", err->detail) : 0,
			 err->hint[0] ? errhint("%s", err->hint) : 0));
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

/*
 * Check the text keys of one side (users or items) of a validated view:
 * valid in the database encoding, no NUL byte.  On failure sets *index to
 * the key's index and returns false; *nul tells which check failed.
 */
static bool
text_keys_valid(const int64 *off, const char *text, int64 n, int64 *index, bool *nul)
{
	int			enc = GetDatabaseEncoding();
	int64		i;
	uint64		since_poll = 0;

	for (i = 0; i < n; i++)
	{
		const char *s = text + off[i];
		int			len = (int) (off[i + 1] - off[i]);

		/* up to 720 MB of text: look for a cancel every few megabytes */
		since_poll += (uint64) len + 8;
		if (since_poll >= AFF_POLL_BYTES)
		{
			CHECK_FOR_INTERRUPTS();
			since_poll = 0;
		}
		*index = i;
		*nul = memchr(s, '\0', len) != NULL;
		if (*nul || !pg_verify_mbstr(enc, s, len, true))
			return false;
	}
	return true;
}

/*
 * Raise the error for text keys that text_keys_valid refused.  built means
 * the extension made the value itself, which must never happen.
 */
static void
report_bad_text_key(const char *what, int64 index, bool nul, bool built)
{
	const char *why = nul ? "holds a NUL byte" : "is not valid in the database encoding";

	if (built)
		ereport(ERROR,
				(errcode(ERRCODE_INTERNAL_ERROR),
				 errmsg("affinity built a model value that fails its own validation"),
				 errdetail("The text of %s key index " INT64_FORMAT " %s (%s).",
						   what, index, why, GetDatabaseEncodingName())));
	ereport(ERROR,
			(errcode(ERRCODE_CHARACTER_NOT_IN_REPERTOIRE),
			 errmsg("invalid affinity.model value"),
			 errdetail("The text of %s key index " INT64_FORMAT " %s (%s).",
					   what, index, why, GetDatabaseEncodingName()),
			 errhint("Text keys are stored in the database encoding; a value made in a database of another encoding has to be fitted again here.")));
}

/* The text checks of a validated view, for each side with text keys. */
static void
check_text_keys(const AffModelView *view, bool built)
{
	int64		index;
	bool		nul;

	if (view->sections[AFF_SEC_FEATURE_TEXT_OFF] != NULL &&
		!text_keys_valid(view->sections[AFF_SEC_FEATURE_TEXT_OFF], view->sections[AFF_SEC_FEATURE_TEXT],
						 (int64) view->counts[AFF_SEC_FEATURE_TEXT_OFF] - 1, &index, &nul))
		report_bad_text_key("feature", index, nul, built);
	if (aff_keys_side_text(view->h->key_type, true) &&
		!text_keys_valid(view->user_text_off, view->user_text, view->h->n_users, &index, &nul))
		report_bad_text_key("user", index, nul, built);
	if (aff_keys_side_text(view->h->key_type, false) &&
		!text_keys_valid(view->item_text_off, view->item_text, view->h->n_items, &index, &nul))
		report_bad_text_key("item", index, nul, built);
}

/* Refuse a value of size bytes over AFF_MAX_MODEL_BYTES. */
static void
check_model_size(uint64 size, bool building)
{
	if (size <= AFF_MAX_MODEL_BYTES)
		return;
	if (building)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("model is too large for one value"),
				 errdetail("It needs " UINT64_FORMAT " bytes; a model value holds at most " UINT64_FORMAT " bytes (720 MB), so that its text form fits a dump.",
						   size, (uint64) AFF_MAX_MODEL_BYTES),
				 errhint("Fit fewer items: raise min_item_interactions, filter the rows, or use item_knn instead of ease.")));
	ereport(ERROR,
			(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
			 errmsg("affinity.model value is too large"),
			 errdetail("The value has " UINT64_FORMAT " bytes; the largest accepted is " UINT64_FORMAT " bytes (720 MB).",
					   size, (uint64) AFF_MAX_MODEL_BYTES)));
}

/*
 * Encode parts into a new varlena in CurrentMemoryContext, seal it with
 * its content digest and run every check a value meets on its way in.  A
 * failed check is an internal error: every value the extension returns can
 * be restored.  Each step (copy, fingerprint and checksum, digest, full
 * validation, text checks) polls for a cancel between chunks of a few
 * megabytes, so a cancel stops it within milliseconds.
 */
bytea *
model_build(const AffModelParts *parts)
{
	AffModelParts p = *parts;
	AffModelView view;
	AffError	err;
	uint64		size;
	bytea	   *v;
	AffStatus	rc;

	/* the fingerprint is computed over a header whose digest is zero */
	memset(p.h.content_digest, 0, sizeof(p.h.content_digest));
	if (aff_model_size(&p, &size, &err) != AFF_OK)
		report_engine_error(&err);
	check_model_size(size, true);
	v = (bytea *) palloc_extended(size, MCXT_ALLOC_HUGE);
	engine_check(aff_model_write_polled(&p, (uint8 *) v, size, engine_poll, NULL, &err), &err);
	SET_VARSIZE(v, size);
	engine_check(aff_model_seal_polled((uint8 *) v, size, engine_poll, NULL, &err), &err);
	rc = aff_model_validate_polled((const uint8 *) v, size, &view, engine_poll, NULL, &err);
	if (rc == AFF_ERR_CANCELLED)
		engine_check(rc, &err);
	if (rc != AFF_OK)
		ereport(ERROR,
				(errcode(ERRCODE_INTERNAL_ERROR),
				 errmsg("affinity built a model value that fails its own validation"),
				 errdetail("%s: %s", err.msg, err.detail)));
	check_text_keys(&view, true);
	return v;
}

/*
 * The checks of a value on its way in (v: a fresh varlena of its own,
 * modified in place): size, full validation, text keys, content digest,
 * each polling for a cancel between chunks.  A value without a digest
 * (written before the digest existed) gets one, and the checksum that
 * covers it; its fingerprint stays as stored.
 */
static void
model_accept(bytea *v)
{
	uint64		size = VARSIZE(v);
	AffModelView view;
	AffError	err;
	AffStatus	rc;
	uint8		digest[AFF_SHA256_BYTES];

	check_model_size(size, false);
	if (size < sizeof(AffModelHeader))
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_BINARY_REPRESENTATION),
				 errmsg("invalid affinity.model value"),
				 errdetail("The value has " UINT64_FORMAT " bytes, fewer than a model header.",
						   size - VARHDRSZ)));
	rc = aff_model_validate_polled((const uint8 *) v, size, &view, engine_poll, NULL, &err);
	if (rc == AFF_ERR_CANCELLED)
		engine_check(rc, &err);
	if (rc != AFF_OK)
		report_engine_error(&err);
	check_text_keys(&view, false);
	if (aff_model_digest_unset((const uint8 *) v))
	{
		engine_check(aff_model_seal_polled((uint8 *) v, size, engine_poll, NULL, &err), &err);
		return;
	}
	engine_check(aff_model_digest_polled((const uint8 *) v, size, digest, engine_poll, NULL, &err),
				 &err);
	if (memcmp(digest, view.h->content_digest, AFF_SHA256_BYTES) != 0)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_BINARY_REPRESENTATION),
				 errmsg("affinity.model content digest mismatch"),
				 errdetail("The value's content does not match the SHA-256 digest in its header; it was damaged or altered.")));
}

PG_FUNCTION_INFO_V1(affinity_model_in);

/*
 * Text input: base64, white space ignored, decoded straight into the new
 * value (no copy of the text is made), polling for a cancel as it goes.
 */
Datum
affinity_model_in(PG_FUNCTION_ARGS)
{
	char	   *in = PG_GETARG_CSTRING(0);
	size_t		tlen = strlen(in);
	size_t		cap = aff_b64_decoded_max(tlen);
	size_t		bad_at;
	int64		n;
	bytea	   *v;

	if (cap > MaxAllocHugeSize - VARHDRSZ)
		elog(ERROR, "affinity.model text of %zu characters cannot be decoded", tlen);
	v = (bytea *) palloc_extended(cap + VARHDRSZ, MCXT_ALLOC_HUGE);
	n = aff_b64_decode_polled(in, tlen, (uint8 *) VARDATA(v), &bad_at, engine_poll, NULL);
	if (n == AFF_B64_CANCELLED)
		engine_check(AFF_ERR_CANCELLED, NULL);
	if (n < 0)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_TEXT_REPRESENTATION),
				 errmsg("invalid input syntax for type affinity.model"),
				 errdetail("The text is not valid base64 at character %zu of %zu.",
						   bad_at + 1, tlen),
				 errhint("A model's text form is what its output gives, for example in pg_dump.")));
	check_model_size((uint64) n + VARHDRSZ, false);
	SET_VARSIZE(v, n + VARHDRSZ);
	model_accept(v);
	PG_RETURN_POINTER(v);
}

PG_FUNCTION_INFO_V1(affinity_model_out);

/*
 * Text output: base64 without line breaks, sized over size_t (the text of
 * a value of AFF_MAX_MODEL_BYTES is 960 MB), encoded in chunks with a
 * look for a cancel between them.  A value that cannot have a
 * text form under 1 GB (one built before the limit) is refused with the
 * way out.
 */
Datum
affinity_model_out(PG_FUNCTION_ARGS)
{
	bytea	   *v = PG_GETARG_BYTEA_PP(0);
	size_t		len = VARSIZE_ANY_EXHDR(v);
	size_t		n = aff_b64_encoded_len(len);
	char	   *out;
	AffError	err;

	if ((n == 0 && len > 0) || n >= MaxAllocSize)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("affinity.model value is too large for its text form"),
				 errdetail("The value has %zu bytes; its base64 text would have %zu characters, over the 1 GB limit of a string.",
						   len, n),
				 errhint("Binary COPY carries it; a model of at most 720 MB has a text form.")));
	out = palloc_extended(n + 1, MCXT_ALLOC_HUGE);
	engine_check(aff_b64_encode_polled((const uint8 *) VARDATA_ANY(v), len, out,
									   engine_poll, NULL, &err), &err);
	out[n] = '\0';
	PG_RETURN_CSTRING(out);
}

/* memcpy of n bytes in chunks, with CHECK_FOR_INTERRUPTS between them. */
static void
copy_polled(void *dst, const void *src, Size n)
{
	char	   *d = dst;
	const char *s = src;

	while (n > AFF_POLL_BYTES)
	{
		memcpy(d, s, AFF_POLL_BYTES);
		d += AFF_POLL_BYTES;
		s += AFF_POLL_BYTES;
		n -= AFF_POLL_BYTES;
		CHECK_FOR_INTERRUPTS();
	}
	memcpy(d, s, n);
}

PG_FUNCTION_INFO_V1(affinity_model_recv);

/* Binary receive: the bytes after the length word, checked as text input is. */
Datum
affinity_model_recv(PG_FUNCTION_ARGS)
{
	StringInfo	buf = (StringInfo) PG_GETARG_POINTER(0);
	int			len = buf->len - buf->cursor;
	const char *data;
	bytea	   *v;

	check_model_size((uint64) len + VARHDRSZ, false);
	data = pq_getmsgbytes(buf, len);
	v = (bytea *) palloc_extended((Size) len + VARHDRSZ, MCXT_ALLOC_HUGE);
	SET_VARSIZE(v, len + VARHDRSZ);
	copy_polled(VARDATA(v), data, len);
	pq_getmsgend(buf);
	model_accept(v);
	PG_RETURN_POINTER(v);
}

PG_FUNCTION_INFO_V1(affinity_model_send);

Datum
affinity_model_send(PG_FUNCTION_ARGS)
{
	bytea	   *v = PG_GETARG_BYTEA_PP(0);
	StringInfoData buf;

	pq_begintypsend(&buf);
	pq_sendbytes(&buf, VARDATA_ANY(v), VARSIZE_ANY_EXHDR(v));
	PG_RETURN_BYTEA_P(pq_endtypsend(&buf));
}
