# Makefile for the affinity extension (PGXS)

MODULE_big = affinity
OBJS = \
	src/core/util.o \
	src/core/parallel.o \
	src/core/interactions.o \
	src/core/als.o \
	src/core/topk.o \
	src/core/rules.o \
	src/core/model_format.o \
	src/core/digest.o \
	src/core/blas_pool.o \
	src/core/text_key.o \
	src/core/ease.o \
	src/core/knn.o \
	src/core/method.o \
	src/core/method_weights.o \
	src/core/method_als.o \
	src/core/method_popularity.o \
	src/core/method_ease.o \
	src/core/method_knn.o \
	src/core/method_profiles.o \
	src/core/method_content.o \
	src/core/method_sequences.o \
	src/core/serve.o \
	src/pg/guc.o \
	src/pg/options.o \
	src/pg/model_io.o \
	src/pg/model_cache.o \
	src/pg/fit_agg.o \
	src/pg/serving_common.o \
	src/pg/rules.o \
	src/pg/serving.o \
	src/pg/batch.o \
	src/pg/inspect.o \
	src/pg/metrics.o \
	src/pg/erase.o \
	src/pg/text_keys.o \
	src/pg/method_glue.o \
	src/pg/profiles.o \
	src/pg/content.o \
	src/pg/sequences.o

EXTENSION = affinity
EXTVERSION = 1.3
DATA = src/affinity--1.0.sql src/affinity--1.0--1.1.sql src/affinity--1.1--1.2.sql src/affinity--1.2--1.3.sql
PGFILEDESC = "affinity - recommendation models in SQL"

REGRESS = type fit serving batch metrics methods registry text_keys mixed_keys corrupt privileges errors upgrade profiles content sequences
ISOLATION = refresh_race
REGRESS_OPTS = --inputdir=. --outputdir=. --load-extension=affinity

BLAS_CFLAGS := $(shell pkg-config --cflags openblas 2>/dev/null)
BLAS_LIBS := $(shell pkg-config --libs openblas 2>/dev/null || echo -lopenblas)

PG_CPPFLAGS = $(BLAS_CFLAGS) -DAFFINITY_VERSION=\"$(EXTVERSION)\"
# Only what PostgreSQL looks up is exported (PGDLLEXPORT, src/pg/affinity_pg.h):
# the library is loaded into the server's namespace, where any other exported
# name could clash with the server's or another module's
PG_CFLAGS = -std=gnu11 -O3 -pthread -fopenmp-simd -fvisibility=hidden
SHLIB_LINK = $(BLAS_LIBS) -pthread -lm

# make AFF_ASSERTS=1: check the stated preconditions (AFF_ASSERT) in the
# engine and the binding; a failed one aborts the backend with its condition
ifdef AFF_ASSERTS
PG_CPPFLAGS += -DAFF_ASSERTS
endif
# the objects are rebuilt when the flag changes (.build-flags records it)
BUILD_FLAGS := AFF_ASSERTS=$(AFF_ASSERTS)
$(shell echo '$(BUILD_FLAGS)' | cmp -s - .build-flags || echo '$(BUILD_FLAGS)' >.build-flags)

EXTRA_CLEAN = results regression.diffs regression.out .build-flags

# no LLVM bitcode: the JIT gains nothing here and it would need clang
override with_llvm = no

PG_CONFIG ?= pg_config
PGXS := $(shell $(PG_CONFIG) --pgxs)
include $(PGXS)

# PGXS does not track header dependencies: rebuild every object when a header changes
$(OBJS): $(wildcard src/core/*.h src/pg/*.h) .build-flags
