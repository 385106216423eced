/*
 * text_keys.c
 *		Text keys.  A model with text keys works on int64 keys like any
 *		other (aff_text_key: SipHash-2-4 of the text under the model's random
 *		hash key, text_key.c) and keeps the texts beside them, in key order,
 *		for output and for checking lookups.
 *
 * During a fit each distinct text goes into a TextDict: its bytes go to
 * the end of one arena, and its key with the text's offset and length to an
 * open-addressing table (linear probing) indexed by the key itself.  Two
 * different texts with the same key under the fit's hash key, which only
 * chance can produce, are reported to the caller, which draws another hash
 * key and re-keys the dictionaries and its rows (text_dict_rekey); a fit
 * never refuses distinct texts.  Since nobody knows the hash key, nobody can
 * choose texts that crowd one run of slots of the
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

/* First capacities of the table (slots) and of the arena (bytes). */
#define TABLE_FIRST		1024
#define ARENA_FIRST		(64 * 1024)

/* Largest capacity (2^40 slots of 32 bytes: far beyond any memory). */
#define TABLE_MAX		((uint64) 1 << 40)

/* A table of cap slots (a power of two) holds at most 70 % of cap. */
#define TABLE_FULL(n, cap)	((uint64) (n) * 10 > (uint64) (cap) * 7)

/* An empty table of the first capacity that holds nelem slots. */
static void
table_init(TextDict *d, TextTable *t, int64 nelem)
{
	uint64		cap = TABLE_FIRST;

	while (TABLE_FULL(nelem, cap))
	{
		if (cap >= TABLE_MAX)
			ereport(ERROR,
					(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
					 errmsg("too many distinct text keys in affinity.fit"),
					 errdetail("A side of the fit holds " INT64_FORMAT " distinct texts.",
							   nelem)));
		cap *= 2;
	}
	StaticAssertStmt(TABLE_MAX <= MaxAllocHugeSize / sizeof(TextSlot),
					 "the slot array of TABLE_MAX slots fits one allocation");
	t->slots = MemoryContextAllocExtended(d->cxt, cap * sizeof(TextSlot),
										  MCXT_ALLOC_HUGE | MCXT_ALLOC_ZERO);
	t->mask = cap - 1;
	t->n = 0;
}

/*
 * The slot of key in t, or the empty slot where it would go.  The table is
 * never full (TABLE_FULL), so the probe ends.
 */
static inline TextSlot *
table_slot(const TextTable *t, int64 key)
{
	uint64		i = (uint64) key & t->mask;

	for (;;)
	{
		TextSlot   *e = &t->slots[i];

		if (!e->used || e->key == key)
			return e;
		i = (i + 1) & t->mask;
	}
}

/* The used slot of key in t, or NULL. */
static TextSlot *
table_find(const TextTable *t, int64 key)
{
	TextSlot   *e = table_slot(t, key);

	return e->used ? e : NULL;
}

/*
 * Double the capacity of t, placing every slot again by its stored key
 * (keys are distinct within a table: no text is compared or hashed).
 */
static void
table_grow(TextDict *d, TextTable *t)
{
	TextTable	nt;
	uint64		i;

	table_init(d, &nt, (int64) (t->mask + 1));
	for (i = 0; i <= t->mask; i++)
	{
		if ((i & 0xffff) == 0xffff)
			CHECK_FOR_INTERRUPTS();
		if (t->slots[i].used)
			*table_slot(&nt, t->slots[i].key) = t->slots[i];
	}
	nt.n = t->n;
	pfree(t->slots);
	*t = nt;
}

/* An empty dictionary in a new child context of parent. */
TextDict *
text_dict_create(MemoryContext parent)
{
	MemoryContext cxt = AllocSetContextCreate(parent, "affinity text keys",
											  ALLOCSET_DEFAULT_SIZES);
	TextDict   *d = MemoryContextAllocZero(cxt, sizeof(TextDict));

	d->cxt = cxt;
	d->arena = MemoryContextAllocHuge(cxt, ARENA_FIRST);
	d->arena_size = ARENA_FIRST;
	table_init(d, &d->tab, 0);
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
	return d->tab.n;
}

/* Bytes the dictionary holds: texts, table, arena slack. */
Size
text_dict_memory(TextDict *d)
{
	return MemoryContextMemAllocated(d->cxt, true);
}

/* Append s[0..len) to the arena; its offset there. */
static uint64
store_text(TextDict *d, const char *s, int len)
{
	uint64		off = d->bytes;

	if (d->arena_size - d->bytes < (Size) len)
	{
		Size		size = d->arena_size;

		if ((Size) len > MaxAllocHugeSize - d->bytes)
			ereport(ERROR,
					(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
					 errmsg("text keys of affinity.fit exceed the memory one allocation can hold"),
					 errdetail("The texts of a side of the fit take %zu bytes.", d->bytes)));
		while (size - d->bytes < (Size) len)
			size = (size > MaxAllocHugeSize / 2) ? MaxAllocHugeSize : size * 2;
		d->arena = repalloc_huge(d->arena, size);
		d->arena_size = size;
	}
	memcpy(d->arena + off, s, len);
	d->bytes += len;
	return off;
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
	TextSlot   *e = table_slot(&d->tab, key);

	*collision = false;
	if (e->used)
	{
		if (e->len != len || memcmp(d->arena + e->off, s, len) != 0)
			*collision = true;
		return key;
	}
	if (TABLE_FULL(d->tab.n + 1, d->tab.mask + 1))
	{
		table_grow(d, &d->tab);
		e = table_slot(&d->tab, key);
	}
	/* store first: an error there leaves the table as it was */
	e->off = store_text(d, s, len);
	e->key = key;
	e->len = len;
	e->mapped = 0;
	e->used = true;
	d->tab.n++;
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
	uint64		i;

	for (i = 0; i <= from->tab.mask; i++)
	{
		TextSlot   *e = &from->tab.slots[i];
		bool		collision;

		if ((i & 0xffff) == 0xffff)
			CHECK_FOR_INTERRUPTS();
		if (!e->used)
			continue;
		e->mapped = text_dict_add(into, hash_key, from->arena + e->off, e->len,
								  &collision);
		if (collision)
			return false;
	}
	return true;
}

/*
 * Compute every text's key under a new hash key into a second table, and
 * record it in the current entries (text_dict_mapped), so the caller can
 * remap its rows before text_dict_rekey_finish.  False, with nothing
 * changed, when two texts collide under the new key.  Both tables point
 * into the one arena.
 */
bool
text_dict_rekey(TextDict *d, const uint64 hash_key[2])
{
	uint64		i;

	text_dict_rekey_abort(d);
	table_init(d, &d->next, d->tab.n);
	for (i = 0; i <= d->tab.mask; i++)
	{
		TextSlot   *e = &d->tab.slots[i];
		TextSlot   *ne;

		if ((i & 0xffff) == 0xffff)
			CHECK_FOR_INTERRUPTS();
		if (!e->used)
			continue;
		e->mapped = aff_text_key(hash_key, d->arena + e->off, (size_t) e->len);
		ne = table_slot(&d->next, e->mapped);
		if (ne->used)
		{
			text_dict_rekey_abort(d);
			return false;
		}
		ne->key = e->mapped;
		ne->off = e->off;
		ne->len = e->len;
		ne->mapped = 0;
		ne->used = true;
		d->next.n++;
	}
	return true;
}

/* The table under the new key replaces the old one. */
void
text_dict_rekey_finish(TextDict *d)
{
	pfree(d->tab.slots);
	d->tab = d->next;
	memset(&d->next, 0, sizeof(d->next));
}

/* Drop the table under the new key. */
void
text_dict_rekey_abort(TextDict *d)
{
	if (d->next.slots != NULL)
		pfree(d->next.slots);
	memset(&d->next, 0, sizeof(d->next));
}

/* The key recorded by text_dict_merge or text_dict_rekey for key. */
int64
text_dict_mapped(TextDict *d, int64 key)
{
	TextSlot   *e = table_find(&d->tab, key);

	if (e == NULL)
		elog(ERROR, "text key " INT64_FORMAT " lost during the fit", key);
	return e->mapped;
}

/* The texts (count, then length and bytes of each); keys are recomputed. */
void
text_dict_serialize(StringInfo buf, TextDict *d)
{
	uint64		i;

	pq_sendint64(buf, d->tab.n);
	for (i = 0; i <= d->tab.mask; i++)
	{
		TextSlot   *e = &d->tab.slots[i];

		if (!e->used)
			continue;
		pq_sendint32(buf, e->len);
		pq_sendbytes(buf, d->arena + e->off, e->len);
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
	int64	   *o;
	char	   *b;
	uint64		at = 0;
	int64		i;

	if (n < 0 || (uint64) n >= MaxAllocHugeSize / sizeof(int64))
		elog(ERROR, "invalid number of text keys: " INT64_FORMAT, n);
	o = palloc_extended(sizeof(int64) * (n + 1), MCXT_ALLOC_HUGE);
	b = palloc_extended(d->bytes + 1, MCXT_ALLOC_HUGE);
	for (i = 0; i < n; i++)
	{
		TextSlot   *e = table_find(&d->tab, keys[i]);

		if ((i & 0xffff) == 0xffff)
			CHECK_FOR_INTERRUPTS();
		if (e == NULL)
			elog(ERROR, "text key " INT64_FORMAT " lost during the fit", keys[i]);
		/* each key once, so at never passes d->bytes */
		if (e->len > d->bytes - at)
			elog(ERROR, "text key " INT64_FORMAT " repeated in the model", keys[i]);
		o[i] = (int64) at;
		memcpy(b + at, d->arena + e->off, e->len);
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

/*
 * Whether s[0..len) is the canonical decimal form of an int64 (what int8out
 * writes: an optional minus sign, no leading zero, no "-0", no sign "+" or
 * blank), and that integer in *out.
 */
bool
text_key_decimal(const char *s, int len, int64 *out)
{
	bool		neg = len > 0 && s[0] == '-';
	int			i = neg ? 1 : 0;
	uint64		acc = 0;
	uint64		limit = neg ? (uint64) PG_INT64_MAX + 1 : (uint64) PG_INT64_MAX;

	if (len - i < 1 || len - i > 19 || (s[i] == '0' && (len - i > 1 || neg)))
		return false;
	for (; i < len; i++)
	{
		if (s[i] < '0' || s[i] > '9')
			return false;
		if (acc > (limit - (uint64) (s[i] - '0')) / 10)
			return false;
		acc = acc * 10 + (uint64) (s[i] - '0');
	}
	*out = neg ? (int64) (0 - acc) : (int64) acc;
	return true;
}

/*
 * Index of a key of side users given as text, on either kind of side: the
 * text itself on a text side; on a bigint side (of a mixed model), the
 * integer a canonical decimal text writes (text_key_decimal).  -1 when the
 * model does not know the key.
 */
int64
text_key_lookup(const AffModelView *v, bool users, const char *s, int len)
{
	int64		key;

	if (aff_keys_side_text(v->h->key_type, users))
		return text_key_index(v, users, s, len);
	if (!text_key_decimal(s, len, &key))
		return -1;
	return aff_find_key(users ? v->user_keys : v->item_keys,
						users ? v->h->n_users : v->h->n_items, key);
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
