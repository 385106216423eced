/*
 * text_keys.h
 *		Text keys (SKU codes, e-mail hashes): dictionaries built during a
 *		fit, and lookups in a model's text dictionaries while serving.
 */
#ifndef AFFINITY_TEXT_KEYS_H
#define AFFINITY_TEXT_KEYS_H

#include "affinity_pg.h"

#include "lib/stringinfo.h"

#include "../core/text_key.h"

/*
 * One slot of a TextDict's table: a text's int64 key and where its bytes
 * sit in the dictionary's arena.
 */
typedef struct TextSlot
{
	int64		key;
	int64		mapped;			/* its key in another table (merge, re-key) */
	uint64		off;			/* offset of the text in the arena */
	int32		len;
	bool		used;
} TextSlot;

/*
 * An open-addressing table (linear probing, power-of-two capacity) of
 * TextSlots indexed by the low bits of the key.  The key is SipHash-2-4
 * under a hash key nobody outside the fit knows, so chosen texts cannot
 * crowd one run of slots.
 */
typedef struct TextTable
{
	TextSlot   *slots;
	uint64		mask;			/* capacity - 1 */
	int64		n;				/* slots used */
} TextTable;

/*
 * The distinct texts of one side (users or items) of a fit, by int64 key
 * under the fit's hash key.  Everything it holds lives in cxt, its own
 * memory context, so that MemoryContextMemAllocated() counts it exactly.
 */
typedef struct TextDict
{
	TextTable	tab;			/* int64 key -> text */
	TextTable	next;			/* the table under a new key, while re-keying */
	MemoryContext cxt;
	char	   *arena;			/* every text, end to end, not terminated */
	Size		bytes;			/* total text bytes (used part of arena) */
	Size		arena_size;
} TextDict;

extern TextDict *text_dict_create(MemoryContext parent);
extern void text_dict_free(TextDict *d);
extern int64 text_dict_count(TextDict *d);
extern Size text_dict_memory(TextDict *d);
extern int64 text_dict_add(TextDict *d, const uint64 hash_key[2], const char *s,
						   int len, bool *collision);
extern bool text_dict_merge(TextDict *into, const uint64 hash_key[2], TextDict *from);
extern bool text_dict_rekey(TextDict *d, const uint64 hash_key[2]);
extern void text_dict_rekey_finish(TextDict *d);
extern void text_dict_rekey_abort(TextDict *d);
extern int64 text_dict_mapped(TextDict *d, int64 key);
extern void text_dict_serialize(StringInfo buf, TextDict *d);
extern TextDict *text_dict_deserialize(StringInfo buf, MemoryContext parent,
									   const uint64 hash_key[2]);
extern void text_dict_layout(TextDict *d, const int64 *keys, int64 n,
							 int64 **off, char **bytes, uint64 *len);

extern int64 text_key_index(const AffModelView *v, bool users, const char *s, int len);
extern Datum text_key_datum(const AffModelView *v, bool users, int64 index);
extern bool text_key_decimal(const char *s, int len, int64 *out);
extern int64 text_key_lookup(const AffModelView *v, bool users, const char *s, int len);

#endif
