# oddsky - build, test and run.
#
#   make            build build/oddsky and the core library
#   make test       install what is missing, then run every test
#   make demo       install what is missing, build, run the demo
#   make bench      benchmarks (not part of make test)
#   make asan       the tests under AddressSanitizer + UBSan
#   make valgrind   the unit tests under valgrind memcheck
#   make fuzz       each libFuzzer target for FUZZ_SECONDS
#   make kafka-up / kafka-down   a local single-node Kafka broker
#   make install PREFIX=/usr/local
#
# Object files go under $(BUILD); header dependencies are tracked with -MMD
# and every object depends on a stamp of the flags, so changing CFLAGS or
# the sanitizer mode rebuilds everything.

BUILD    ?= build
CC       ?= cc
PREFIX   ?= /usr/local
OPT      ?= -O2
SAN      ?=
FUZZ_SECONDS ?= 60

WARN     := -Wall -Wextra -Werror
CPPFLAGS += -D_POSIX_C_SOURCE=200809L -D_DEFAULT_SOURCE
CFLAGS   += -std=c11 $(WARN) $(OPT) -g -fPIC -MMD -MP $(SAN)
LDFLAGS  += $(SAN)

DAEMON_LIBS := -lrdkafka -lavro -ljansson -luv -lhttp_parser -lz -lpthread -lm
TEST_LIBS   := -lcmocka

CORE_SRC   := $(sort $(wildcard core/*.c))
DAEMON_SRC := $(sort $(wildcard daemon/*.c))
UNIT_SRC   := $(sort $(wildcard tests/unit/test_*.c))
BENCH_SRC  := $(sort $(wildcard tests/bench/*.c))

CORE_OBJ   := $(CORE_SRC:%.c=$(BUILD)/%.o)
DAEMON_OBJ := $(DAEMON_SRC:%.c=$(BUILD)/%.o)
DAEMON_LIB_OBJ := $(filter-out $(BUILD)/daemon/main.o,$(DAEMON_OBJ))
UNIT_BIN   := $(UNIT_SRC:%.c=$(BUILD)/%)
BENCH_BIN  := $(BENCH_SRC:%.c=$(BUILD)/%)

FLAGS_STAMP := $(BUILD)/.flags
FLAGS_NOW   := $(CC) $(CPPFLAGS) $(CFLAGS) $(LDFLAGS)

.PHONY: all test demo bench bench-core asan valgrind fuzz kafka-up kafka-down \
        install clean units deps
.DEFAULT_GOAL := all

all: $(BUILD)/oddsky $(BUILD)/libodcore.so $(BUILD)/libodcore.a

$(FLAGS_STAMP): FORCE
	@mkdir -p $(@D)
	@echo '$(FLAGS_NOW)' | cmp -s - $@ || echo '$(FLAGS_NOW)' > $@

FORCE:

# V=1 shows every command.
Q := $(if $(V),,@)

$(BUILD)/%.o: %.c $(FLAGS_STAMP)
	@mkdir -p $(@D)
	@$(if $(V),,echo "  CC    $<")
	$(Q)$(CC) $(CPPFLAGS) $(CFLAGS) -c $< -o $@

# core/ is built without any third-party include path on purpose.
$(BUILD)/libodcore.a: $(CORE_OBJ)
	@rm -f $@
	$(Q)ar rcs $@ $^

$(BUILD)/libodcore.so: $(CORE_OBJ)
	$(Q)$(CC) -shared $(LDFLAGS) -o $@ $^ -lm

$(BUILD)/oddsky: $(DAEMON_OBJ) $(BUILD)/libodcore.a
	@$(if $(V),,echo "  LINK  $@")
	$(Q)$(CC) $(LDFLAGS) -o $@ $(DAEMON_OBJ) $(BUILD)/libodcore.a $(DAEMON_LIBS)

$(BUILD)/tests/unit/%: tests/unit/%.c $(DAEMON_LIB_OBJ) $(BUILD)/libodcore.a $(FLAGS_STAMP)
	@mkdir -p $(@D)
	@$(if $(V),,echo "  TEST  $@")
	$(Q)$(CC) $(CPPFLAGS) $(CFLAGS) -I. -o $@ $< $(DAEMON_LIB_OBJ) $(BUILD)/libodcore.a \
	    $(TEST_LIBS) $(DAEMON_LIBS) $(LDFLAGS)

$(BUILD)/tests/bench/%: tests/bench/%.c $(DAEMON_LIB_OBJ) $(BUILD)/libodcore.a $(FLAGS_STAMP)
	@mkdir -p $(@D)
	@$(if $(V),,echo "  BENCH $@")
	$(Q)$(CC) $(CPPFLAGS) $(CFLAGS) -I. -o $@ $< $(DAEMON_LIB_OBJ) $(BUILD)/libodcore.a \
	    $(DAEMON_LIBS) $(LDFLAGS)

units: $(UNIT_BIN)

deps:
	@tests/setup/ensure-deps.sh

test: deps
	@$(MAKE) --no-print-directory all units $(BENCH_BIN)
	@BUILD=$(BUILD) tests/run-all.sh

bench-core: deps
	@$(MAKE) --no-print-directory all $(BENCH_BIN)
	@BUILD=$(BUILD) tests/bench/run-core.sh

bench: deps
	@$(MAKE) --no-print-directory all $(BENCH_BIN)
	@BUILD=$(BUILD) tests/bench/run-all.sh

demo: deps
	@$(MAKE) --no-print-directory all
	$(BUILD)/oddsky demo

asan: deps
	@$(MAKE) --no-print-directory BUILD=build/asan OPT=-O1 \
	    SAN="-fsanitize=address,undefined -fno-omit-frame-pointer -fno-sanitize-recover=undefined" \
	    all units
	@BUILD=build/asan ODDSKY_SANITIZED=1 tests/run-all.sh --quick

valgrind: all units
	@BUILD=$(BUILD) tests/run-valgrind.sh

fuzz: deps
	@BUILD=$(BUILD) FUZZ_SECONDS=$(FUZZ_SECONDS) tests/fuzz/run.sh

kafka-up: deps
	@deploy/kafka-local up

kafka-down:
	@deploy/kafka-local down

install: all
	install -d $(DESTDIR)$(PREFIX)/bin $(DESTDIR)$(PREFIX)/share/oddsky/schemas
	install -m 0755 $(BUILD)/oddsky $(DESTDIR)$(PREFIX)/bin/oddsky
	install -m 0644 config/*.json $(DESTDIR)$(PREFIX)/share/oddsky/
	install -m 0644 config/schemas/*.avsc $(DESTDIR)$(PREFIX)/share/oddsky/schemas/

clean:
	rm -rf $(BUILD)/core $(BUILD)/daemon $(BUILD)/tests $(BUILD)/oddsky \
	       $(BUILD)/libodcore.* $(BUILD)/asan $(BUILD)/.flags

# Files embedded with .incbin (not seen by -MMD).
$(BUILD)/daemon/demo_assets.o: config/demo-featmap.json

-include $(CORE_OBJ:.o=.d) $(DAEMON_OBJ:.o=.d) $(UNIT_BIN:=.d) $(BENCH_BIN:=.d)
