/*
 * text_keys.c
 *		Text keys.  A model with text keys works on int64 keys like any
 *		other (aff_text_key: SipHash-2-4 of the text under the model's random
 *		hash key, text_key.c) and keeps the texts beside them, in key order,
 *		for output and for checking lookups.
 *
 * During a fit each distinct text goes into a TextDict (a hash table in a
 * memory context of its own).  Two different texts with the same key under
 * the fit's hash key, which only chance can produce, are reported to the
 * caller, which draws another hash key and re-keys the dictionaries and its
 * rows (text_dict_rekey); a fit never refuses distinct texts.  Since nobody
 * knows the hash key, nobody can choose texts that crowd one bucket of the
 * table either.  While serving, a text is hashed under the model's key,
 * found by binary search, and then compared byte for byte with the stored
 * text, so a text the model does not hold can never be taken for one it
 * does.
 */
#include "text_keys.h"

#include "libpq/pqformat.h"
#include "miscadmin.h"
#include "utils/builtins.h"
#include "utils/memutils.h"

#include "../core/interactions.h"

/* Texts up to this size are packed into shared blocks of TEXT_BLOCK bytes. */
#define TEXT_BLOCK		(64 * 1024)
#define TEXT_SMALL		(TEXT_BLOCK / 16)

typedef struct TextEntry
{
	int64		key;
	int64		mapped;			/* its key in another table (merge, re-key) */
	char	   *s;				/* not terminated */
	int32		len;
} TextEntry;

static HTAB *
new_table(TextDict *d, long nelem)
{
	HASHCTL		ctl;

	memset(&ctl, 0, sizeof(ctl));
	ctl.keysize = sizeof(int64);
	ctl.entrysize = sizeof(TextEntry);
	ctl.hcxt = d->cxt;
	return hash_create("affinity text keys", Max(nelem, 1024), &ctl,
					   HASH_ELEM | HASH_BLOBS | HASH_CONTEXT);
}

/* An empty dictionary in a new child context of parent. */
TextDict *
text_dict_create(MemoryContext parent)
{
	MemoryContext cxt = AllocSetContextCreate(parent, "affinity text keys",
											  ALLOCSET_DEFAULT_SIZES);
	TextDict   *d = MemoryContextAllocZero(cxt, sizeof(TextDict));

	d->cxt = cxt;
	d->tab = new_table(d, 1024);
	return d;
}

/* Free everything the dictionary holds, the struct included. */
void
text_dict_free(TextDict *d)
{
	MemoryContextDelete(d->cxt);
}

int64
text_dict_count(TextDict *d)
{
	return (int64) hash_get_num_entries(d->tab);
}

/* Bytes the dictionary holds: texts, table, entries, block slack. */
Size
text_dict_memory(TextDict *d)
{
	return MemoryContextMemAllocated(d->cxt, true);
}

/* A copy of s[0..len) in the dictionary's memory (small texts packed). */
static char *
store_text(TextDict *d, const char *s, int len)
{
	char	   *p;

	if (len > TEXT_SMALL)
		p = MemoryContextAllocHuge(d->cxt, Max(len, 1));
	else
	{
		if (d->arena_left < (Size) len)
		{
			d->arena = MemoryContextAlloc(d->cxt, TEXT_BLOCK);
			d->arena_left = TEXT_BLOCK;
		}
		p = d->arena;
		d->arena += len;
		d->arena_left -= len;
	}
	memcpy(p, s, len);
	d->bytes += len;
	return p;
}

/*
 * Add a text (if new) and return its int64 key under hash_key.  When
 * another text already has that key, nothing is added and *collision is
 * set: the caller re-keys and tries again.
 */
int64
text_dict_add(TextDict *d, const uint64 hash_key[2], const char *s, int len,
			  bool *collision)
{
	int64		key = aff_text_key(hash_key, s, (size_t) len);
	bool		found;
	TextEntry  *e = hash_search(d->tab, &key, HASH_ENTER, &found);

	*collision = false;
	if (!found)
	{
		e->len = len;
		e->mapped = 0;
		e->s = store_text(d, s, len);
	}
	else if (e->len != len || memcmp(e->s, s, len) != 0)
		*collision = true;
	return key;
}

/*
 * Add every text of from to into, under into's hash key, recording in each
 * entry of from its key in into (text_dict_mapped).  False on a collision
 * under that key: the caller re-keys into and merges again.
 */
bool
text_dict_merge(TextDict *into, const uint64 hash_key[2], TextDict *from)
{
	HASH_SEQ_STATUS seq;
	TextEntry  *e;
	int64		n = 0;

	hash_seq_init(&seq, from->tab);
	while ((e = hash_seq_search(&seq)) != NULL)
	{
		bool		collision;

		if ((++n & 0xffff) == 0)
			CHECK_FOR_INTERRUPTS();
		e->mapped = text_dict_add(into, hash_key, e->s, e->len, &collision);
		if (collision)
		{
			hash_seq_term(&seq);
			return false;
		}
	}
	return true;
}

/*
 * Compute every text's key under a new hash key into a second table, and
 * record it in the current entries (text_dict_mapped), so the caller can
 * remap its rows before text_dict_rekey_finish.  False, with nothing
 * changed, when two texts collide under the new key.
 */
bool
text_dict_rekey(TextDict *d, const uint64 hash_key[2])
{
	HASH_SEQ_STATUS seq;
	TextEntry  *e;
	int64		n = 0;

	d->next = new_table(d, hash_get_num_entries(d->tab));
	hash_seq_init(&seq, d->tab);
	while ((e = hash_seq_search(&seq)) != NULL)
	{
		TextEntry  *ne;
		bool		found;

		if ((++n & 0xffff) == 0)
			CHECK_FOR_INTERRUPTS();
		e->mapped = aff_text_key(hash_key, e->s, (size_t) e->len);
		ne = hash_search(d->next, &e->mapped, HASH_ENTER, &found);
		if (found)
		{
			hash_seq_term(&seq);
			text_dict_rekey_abort(d);
			return false;
		}
		ne->s = e->s;
		ne->len = e->len;
		ne->mapped = 0;
	}
	return true;
}

/* The table under the new key replaces the old one. */
void
text_dict_rekey_finish(TextDict *d)
{
	hash_destroy(d->tab);
	d->tab = d->next;
	d->next = NULL;
}

/* Drop the table under the new key. */
void
text_dict_rekey_abort(TextDict *d)
{
	if (d->next != NULL)
		hash_destroy(d->next);
	d->next = NULL;
}

/* The key recorded by text_dict_merge or text_dict_rekey for key. */
int64
text_dict_mapped(TextDict *d, int64 key)
{
	TextEntry  *e = hash_search(d->tab, &key, HASH_FIND, NULL);

	if (e == NULL)
		elog(ERROR, "text key " INT64_FORMAT " lost during the fit", key);
	return e->mapped;
}

/* The texts (count, then length and bytes of each); keys are recomputed. */
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

/* The dictionary text_dict_serialize wrote, keyed under hash_key. */
TextDict *
text_dict_deserialize(StringInfo buf, MemoryContext parent, const uint64 hash_key[2])
{
	TextDict   *d = text_dict_create(parent);
	int64		n = pq_getmsgint64(buf);
	int64		i;

	if (n < 0 || n > (buf->len - buf->cursor) / 4)
		elog(ERROR, "invalid serialized affinity.fit state");
	for (i = 0; i < n; i++)
	{
		int32		len = pq_getmsgint(buf, 4);
		bool		collision;

		if (len < 0)
			elog(ERROR, "invalid serialized affinity.fit state");
		/* the worker held these texts under this key without a collision */
		(void) text_dict_add(d, hash_key, pq_getmsgbytes(buf, len), len, &collision);
		if (collision)
			elog(ERROR, "invalid serialized affinity.fit state");
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

		if ((i & 0xffff) == 0xffff)
			CHECK_FOR_INTERRUPTS();
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
	int64		i = aff_find_key(keys, n, aff_text_key(v->h->text_hash_key, s, (size_t) len));

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
