/*
 * text_keys.h
 *		Text keys (SKU codes, e-mail hashes): dictionaries built during a
 *		fit, and lookups in a model's text dictionaries while serving.
 */
#ifndef AFFINITY_TEXT_KEYS_H
#define AFFINITY_TEXT_KEYS_H

#include "affinity_pg.h"

#include "lib/stringinfo.h"
#include "utils/hsearch.h"

#include "../core/text_key.h"

/*
 * The distinct texts of one side (users or items) of a fit, by int64 key
 * under the fit's hash key.  Everything it holds lives in cxt, its own
 * memory context, so that MemoryContextMemAllocated() counts it exactly.
 */
typedef struct TextDict
{
	HTAB	   *tab;			/* int64 key -> text */
	HTAB	   *next;			/* the table under a new key, while re-keying */
	MemoryContext cxt;
	Size		bytes;			/* total text bytes */
	char	   *arena;			/* free space of the current block of texts */
	Size		arena_left;
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

#endif
