/*
 * affinity_pg.h
 *		Declarations shared by the PostgreSQL binding of affinity.
 *
 * The binding translates between SQL and the engine in src/core/: options
 * and GUCs into engine parameters, engine status codes into ereport(),
 * engine allocations into memory contexts, and model bytes into varlena
 * values.  It is the only code that calls CHECK_FOR_INTERRUPTS.
 */
#ifndef AFFINITY_PG_H
#define AFFINITY_PG_H

/*
 * Exported names.  The library is built with -fvisibility=hidden, and only
 * what PostgreSQL looks up by name gets default visibility: Pg_magic_func,
 * _PG_init, and each SQL-callable function with its pg_finfo_ record.  Every
 * other exported name would join the server's namespace, where it could
 * take the place of (or be taken by) a symbol of the same name.
 *
 * PostgreSQL 15 defines PGDLLEXPORT empty on Linux unless it is defined
 * already (c.h), so it is defined here, before postgres.h; this header must
 * therefore come before any PostgreSQL header.
 */
#ifdef POSTGRES_H
#error "affinity_pg.h must be included before postgres.h"
#endif
#define PGDLLEXPORT __attribute__((visibility("default")))

#include "postgres.h"
#include "fmgr.h"

/*
 * PostgreSQL 15's PG_FUNCTION_INFO_V1 marks only the pg_finfo_ record
 * PGDLLEXPORT, not the function itself, which -fvisibility=hidden would then
 * hide from the server's lookup; PostgreSQL 16 declares both, as done here.
 * SQL-callable functions are named affinity_*, like their SQL scripts'
 * symbols.
 */
#undef PG_FUNCTION_INFO_V1
#define PG_FUNCTION_INFO_V1(funcname) \
extern PGDLLEXPORT Datum funcname(PG_FUNCTION_ARGS); \
extern PGDLLEXPORT const Pg_finfo_record * CppConcat(pg_finfo_,funcname)(void); \
const Pg_finfo_record * \
CppConcat(pg_finfo_,funcname) (void) \
{ \
	static const Pg_finfo_record my_finfo = { 1 }; \
	return &my_finfo; \
} \
extern int no_such_variable

/* The module's initialisation, which PostgreSQL calls on loading it (guc.c) */
extern PGDLLEXPORT void _PG_init(void);
#include "portability/instr_time.h"
#include "lib/stringinfo.h"
#include "utils/jsonb.h"

#include "../core/aff_core.h"
#include "../core/interactions.h"
#include "../core/model_format.h"
#include "../core/method.h"

/* GUC variables (guc.c) */
extern int	affinity_threads;
extern int	affinity_max_threads;
extern int	affinity_factors;
extern int	affinity_iterations;
extern double affinity_regularization;
extern double affinity_alpha;
extern int	affinity_max_fit_memory_mb;
extern bool affinity_verbose;
extern uint64 affinity_library_tag;

/*
 * Fit options after merging jsonb, GUCs and built-in defaults (options.c):
 * the engine's AffOptions (core/method.h), threads resolved to >= 1.
 */
typedef AffOptions FitOptions;

extern void fit_options_parse(Jsonb *options, FitOptions *o);
extern void fit_option_set(FitOptions *o, const char *key, JsonbValue *v, const char *owner);
extern int	resolve_threads(int requested);

/* Engine glue (model_io.c) */
extern AffAllocator context_allocator(MemoryContext cxt);
extern void report_engine_error(const AffError *err) pg_attribute_noreturn();
extern int	engine_poll(void *arg);
extern void engine_check(AffStatus rc, const AffError *err);
extern double seconds_since(instr_time start);

/* Model values (model_io.c) */
extern bytea *model_build(const AffModelParts *parts);

/* The per-backend model cache (model_cache.c) */
typedef struct CachedModel
{
	MemoryContext cxt;			/* holds the entry and all it owns */
	Oid			toastrelid;		/* InvalidOid for values that came in memory */
	Oid			valueid;
	uint64		size;
	uint64		checksum;		/* as stored in the header */
	uint8		digest[32];		/* content digest, as stored (zero: none) */
	bool		has_digest;
	bytea	   *value;			/* aligned copy of the value */
	AffModelView view;
	double	   *gram;			/* Y^T Y, on first use */
	float	   *item_norms;		/* on first use */
	float	   *user_norms;
	uint64		last_used;
	Size		bytes;
} CachedModel;

extern int	affinity_model_cache_size_mb;
extern CachedModel *model_get(FunctionCallInfo fcinfo, int argno);
extern void model_fetch(FunctionCallInfo fcinfo, int argno, AffModelView *view);
extern const double *cached_gram(CachedModel *e);
extern const float *cached_norms(CachedModel *e, bool users);
extern void cache_stats(int *entries, int64 *bytes, int64 *hits, int64 *loads);

/* Calling methods (method_glue.c) */
extern void raise_engine_error(const AffError *err) pg_attribute_noreturn();
extern void method_fit(const AffMatrix *m, const FitOptions *o,
					   const AffAllocator *a, AffModelParts *parts);
extern const AffMethod *model_method(const AffModelView *v);
#define SERVE_GRAM	1			/* derived data a serving call needs */
#define SERVE_ITEM_NORMS 2
#define SERVE_USER_NORMS 4
extern void serve_context(CachedModel *e, AffServe *s, AffAllocator *a, int needs);
extern void describe_options(StringInfo s, const AffModelHeader *h);

/* Item profiles (profiles.c) */
extern void refuse_catalogue(const AffModelView *v, const char *fn) pg_attribute_noreturn();
extern void check_catalogue_call(FunctionCallInfo fcinfo, const AffModelView *v);

/* Item profiles given to a fit, for method content (content.c) */
extern bytea *fit_profiles_arg(FunctionCallInfo fcinfo, int argno, const FitOptions *o,
							   MemoryContext cxt);
extern void fit_profiles_missing(const FitOptions *o);
extern void fit_profiles_hash_key(bytea *profiles, uint64 key[2]);
extern void fit_profiles_attach(bytea *profiles, AffMatrix *m, AffModelParts *parts,
								const AffAllocator *a);
/* Sequences (sequences.c) */
extern void refuse_sequences(const AffModelView *v, const char *fn) pg_attribute_noreturn();

/* jsonb assembly (serving.c) */
extern Jsonb *jsonb_from_cstring(const char *s);

#endif
