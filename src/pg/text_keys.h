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

typedef struct TextDict
{
	HTAB	   *tab;			/* int64 key -> text */
	MemoryContext cxt;
	Size		bytes;			/* total text bytes */
} TextDict;

extern TextDict *text_dict_create(MemoryContext cxt);
extern int64 text_dict_add(TextDict *d, const char *s, int len, const char *what);
extern void text_dict_merge(TextDict *into, TextDict *from, const char *what);
extern void text_dict_serialize(StringInfo buf, TextDict *d);
extern TextDict *text_dict_deserialize(StringInfo buf, MemoryContext cxt);
extern void text_dict_layout(TextDict *d, const int64 *keys, int64 n,
							 int64 **off, char **bytes, uint64 *len);

extern int64 text_key_index(const AffModelView *v, bool users, const char *s, int len);
extern Datum text_key_datum(const AffModelView *v, bool users, int64 index);

#endif
