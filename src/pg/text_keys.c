/*
 * text_keys.c
 *		Text keys.  A model with text keys works on int64 keys like any
 *		other (aff_text_key: a 64-bit hash of the text) and keeps the texts
 *		beside them, in key order, for output and for checking lookups.
 *
 * During a fit each distinct text goes into a TextDict (a hash table in
 * the aggregate's context); two different texts with the same hash are an
 * error, so the int64 keys of one model are unique.  While serving, a text
 * is hashed, found by binary search, and then compared byte for byte with
 * the stored text, so a text the model does not hold can never be taken
 * for one it does.
 */
#include "text_keys.h"

#include "libpq/pqformat.h"
#include "utils/builtins.h"
#include "utils/memutils.h"

#include "../core/interactions.h"

typedef struct TextEntry
{
	int64		key;
	int32		len;
	char	   *s;
} TextEntry;

TextDict *
text_dict_create(MemoryContext cxt)
{
	TextDict   *d = MemoryContextAllocZero(cxt, sizeof(TextDict));
	HASHCTL		ctl;

	memset(&ctl, 0, sizeof(ctl));
	ctl.keysize = sizeof(int64);
	ctl.entrysize = sizeof(TextEntry);
	ctl.hcxt = cxt;
	d->tab = hash_create("affinity text keys", 1024, &ctl,
						 HASH_ELEM | HASH_BLOBS | HASH_CONTEXT);
	d->cxt = cxt;
	return d;
}

/* Add a text (if new) and return its int64 key. */
int64
text_dict_add(TextDict *d, const char *s, int len, const char *what)
{
	int64		key = aff_text_key(s, (size_t) len);
	bool		found;
	TextEntry  *e = hash_search(d->tab, &key, HASH_ENTER, &found);

	if (!found)
	{
		e->len = len;
		e->s = MemoryContextAlloc(d->cxt, len + 1);
		memcpy(e->s, s, len);
		e->s[len] = '\0';
		d->bytes += len;
	}
	else if (e->len != len || memcmp(e->s, s, len) != 0)
		ereport(ERROR,
				(errcode(ERRCODE_DATA_EXCEPTION),
				 errmsg("two %s keys have the same 64-bit hash", what),
				 errdetail("\"%.*s\" and \"%s\" share the hash " INT64_FORMAT ".",
						   len, s, e->s, key),
				 errhint("Map one of them to another text (for example with a prefix) and fit again.")));
	return key;
}

void
text_dict_merge(TextDict *into, TextDict *from, const char *what)
{
	HASH_SEQ_STATUS seq;
	TextEntry  *e;

	hash_seq_init(&seq, from->tab);
	while ((e = hash_seq_search(&seq)) != NULL)
		text_dict_add(into, e->s, e->len, what);
}

void
text_dict_serialize(StringInfo buf, TextDict *d)
{
	HASH_SEQ_STATUS seq;
	TextEntry  *e;

	pq_sendint64(buf, (int64) hash_get_num_entries(d->tab));
	hash_seq_init(&seq, d->tab);
	while ((e = hash_seq_search(&seq)) != NULL)
	{
		pq_sendint32(buf, e->len);
		pq_sendbytes(buf, e->s, e->len);
	}
}

TextDict *
text_dict_deserialize(StringInfo buf, MemoryContext cxt)
{
	TextDict   *d = text_dict_create(cxt);
	int64		n = pq_getmsgint64(buf);
	int64		i;

	for (i = 0; i < n; i++)
	{
		int32		len = pq_getmsgint(buf, 4);

		text_dict_add(d, pq_getmsgbytes(buf, len), len, "text");
	}
	return d;
}

/*
 * The dictionary section of keys[0..n) (sorted int64 keys of the model):
 * offsets and bytes, allocated in CurrentMemoryContext.
 */
void
text_dict_layout(TextDict *d, const int64 *keys, int64 n, int64 **off,
				 char **bytes, uint64 *len)
{
	int64	   *o = palloc_extended(sizeof(int64) * (n + 1), MCXT_ALLOC_HUGE);
	char	   *b = palloc_extended(d->bytes + 1, MCXT_ALLOC_HUGE);
	uint64		at = 0;
	int64		i;

	for (i = 0; i < n; i++)
	{
		TextEntry  *e = hash_search(d->tab, &keys[i], HASH_FIND, NULL);

		if (e == NULL)
			elog(ERROR, "text key " INT64_FORMAT " lost during the fit", keys[i]);
		o[i] = (int64) at;
		memcpy(b + at, e->s, e->len);
		at += e->len;
	}
	o[n] = (int64) at;
	*off = o;
	*bytes = b;
	*len = at;
}

/* Index of a text key in the model, or -1. */
int64
text_key_index(const AffModelView *v, bool users, const char *s, int len)
{
	const int64 *keys = users ? v->user_keys : v->item_keys;
	const int64 *off = users ? v->user_text_off : v->item_text_off;
	const char *text = users ? v->user_text : v->item_text;
	int64		n = users ? v->h->n_users : v->h->n_items;
	int64		i = aff_find_key(keys, n, aff_text_key(s, (size_t) len));

	if (i < 0 || off[i + 1] - off[i] != len || memcmp(text + off[i], s, len) != 0)
		return -1;
	return i;
}

/* The text key of index i as a text datum. */
Datum
text_key_datum(const AffModelView *v, bool users, int64 index)
{
	const int64 *off = users ? v->user_text_off : v->item_text_off;
	const char *text = users ? v->user_text : v->item_text;

	return PointerGetDatum(cstring_to_text_with_len(text + off[index],
													(int) (off[index + 1] - off[index])));
}
