# stopcock: GNU make build. `make` builds build/stopcockd and build/stopcock;
# `make check` installs missing Debian packages (as root), then runs every
# test and ends with "N passed, N failed, N skipped"; `make demo` runs the
# scenario.
#
# BUILD selects the output directory, so parallel work never shares
# objects. `make check` puts its other legs below it: $(BUILD)/san (ASan +
# UBSan), $(BUILD)/clang and $(BUILD)/fuzz (libFuzzer), whatever BUILD is.

ifeq ($(SAN),1)
BUILD	?= build/san
endif
BUILD	?= build
PREFIX	?= /usr/local
DESTDIR	?=
CC	?= cc
ifeq ($(origin CC),default)
CC	= cc
endif

PKGS_CORE	= gsl jansson inih libcrypto
PKGS_DAEMON	= libevent hiredis libcurl libsystemd rdkafka
PKGS_CLI	= libcurl
PKGS_TEST	= cmocka

WARN	= -Wall -Wextra -Wformat=2 -Wshadow -Wstrict-prototypes \
	  -Wmissing-prototypes -Wwrite-strings -Wno-unused-parameter -Werror
OPT	?= -O2
# The version: the release number, plus the commit when built from git.
VERSION	?= 0.1.0
COMMIT	:= $(shell git rev-parse --short HEAD 2>/dev/null)
override CPPFLAGS += -Iinclude -D_GNU_SOURCE \
	    -DSTOPCOCK_VERSION='"$(VERSION)$(if $(COMMIT),+$(COMMIT))"'
CFLAGS	?= -g
override CFLAGS += -std=c11 $(OPT) $(WARN) -fno-strict-aliasing \
	   $(shell pkg-config --cflags $(PKGS_CORE) $(PKGS_DAEMON) 2>/dev/null)
LDLIBS_CORE	= $(shell pkg-config --libs $(PKGS_CORE) 2>/dev/null) -lm
LDLIBS_DAEMON	= $(shell pkg-config --libs $(PKGS_DAEMON) 2>/dev/null) -pthread
LDLIBS_CLI	= $(shell pkg-config --libs $(PKGS_CLI) 2>/dev/null)
LDLIBS_TEST	= $(shell pkg-config --libs $(PKGS_TEST) 2>/dev/null)

ifeq ($(SAN),1)
OPT	= -O1
override CFLAGS += -fsanitize=address,undefined -fno-omit-frame-pointer \
	   -fno-sanitize-recover=undefined
override LDFLAGS += -fsanitize=address,undefined
endif
# FUZZ=1 (set by `make fuzz`, with CC=clang): the core instrumented for
# libFuzzer's coverage, under ASan + UBSan; fuzz-build links the targets.
ifeq ($(FUZZ),1)
OPT	= -O1
override CFLAGS += -fsanitize=fuzzer-no-link,address,undefined \
	   -fno-omit-frame-pointer -fno-sanitize-recover=undefined
override LDFLAGS += -fsanitize=address,undefined
endif

CORE_SRC	= $(sort $(wildcard src/util/*.c src/core/*.c src/core/stats/*.c))
DAEMON_SRC	= $(sort $(wildcard src/daemon/*.c))
CLI_SRC		= $(sort $(wildcard src/cli/*.c))
UNIT_SRC	= $(sort $(wildcard tests/unit/test_*.c))
TOOL_SRC	= $(sort $(wildcard tests/tools/*.c))
FUZZ_SRC	= $(sort $(wildcard tests/fuzz/fuzz_*.c))

CORE_OBJ	= $(CORE_SRC:%.c=$(BUILD)/obj/%.o)
DAEMON_OBJ	= $(DAEMON_SRC:%.c=$(BUILD)/obj/%.o)
CLI_OBJ		= $(CLI_SRC:%.c=$(BUILD)/obj/%.o)
UNIT_BIN	= $(UNIT_SRC:tests/unit/%.c=$(BUILD)/tests/%)
TOOL_BIN	= $(TOOL_SRC:tests/tools/%.c=$(BUILD)/tests/%)
FUZZ_BIN	= $(FUZZ_SRC:tests/fuzz/%.c=$(BUILD)/%)
LIBCORE		= $(BUILD)/libstopcock.a

# The daemon's page (src/daemon/page.html) is compiled in as a C array,
# so stopcockd serves it with no files at run time.
DAEMON_OBJ	+= $(BUILD)/obj/gen/page.o
$(BUILD)/gen/page.c: src/daemon/page.html tools/embed.sh
	@mkdir -p $(@D)
	sh tools/embed.sh http_page src/daemon/page.html > $@.tmp && mv $@.tmp $@
$(BUILD)/obj/gen/page.o: $(BUILD)/gen/page.c
	@mkdir -p $(@D)
	$(CC) $(CPPFLAGS) $(CFLAGS) -c $< -o $@

.PHONY: all deps check check-fast unit test-build demo bench fuzz \
	fuzz-build install uninstall clean
.DEFAULT_GOAL := all

all: $(BUILD)/stopcockd $(BUILD)/stopcock

$(BUILD)/obj/%.o: %.c
	@mkdir -p $(@D)
	$(CC) $(CPPFLAGS) $(CFLAGS) -MMD -MP -c $< -o $@

$(LIBCORE): $(CORE_OBJ)
	@mkdir -p $(@D)
	$(AR) rcs $@ $^

$(BUILD)/stopcockd: $(DAEMON_OBJ) $(LIBCORE)
	$(CC) $(LDFLAGS) -o $@ $(DAEMON_OBJ) $(LIBCORE) $(LDLIBS_DAEMON) \
	    $(LDLIBS_CORE)

# The CLI links only what it uses (libcurl for `status`): no libevent,
# hiredis or libsystemd (tools/layers.sh checks the binary).
$(BUILD)/stopcock: $(CLI_OBJ) $(LIBCORE)
	$(CC) $(LDFLAGS) -o $@ $(CLI_OBJ) $(LIBCORE) $(LDLIBS_CLI) \
	    $(LDLIBS_CORE)

$(BUILD)/tests/%: tests/unit/%.c $(LIBCORE)
	@mkdir -p $(@D)
	$(CC) $(CPPFLAGS) $(CFLAGS) $(LDFLAGS) -o $@ $< $(LIBCORE) \
	    $(LDLIBS_TEST) $(LDLIBS_CORE)

$(BUILD)/tests/%: tests/tools/%.c $(LIBCORE)
	@mkdir -p $(@D)
	$(CC) $(CPPFLAGS) $(CFLAGS) $(LDFLAGS) -o $@ $< $(LIBCORE) \
	    $(LDLIBS_CORE)

# The mock Kafka cluster and producer of tests/it/test_kafka.py: the one
# probe that links librdkafka (and nothing of the core).
$(BUILD)/tests/kafkamock: tests/tools/kafkamock.c
	@mkdir -p $(@D)
	$(CC) $(CPPFLAGS) $(CFLAGS) $(LDFLAGS) -o $@ $< \
	    $(shell pkg-config --libs rdkafka 2>/dev/null) -lpthread

$(BUILD)/fuzz_%: tests/fuzz/fuzz_%.c $(LIBCORE)
	@mkdir -p $(@D)
	$(CC) $(CPPFLAGS) $(CFLAGS) $(LDFLAGS) -fsanitize=fuzzer -o $@ $< \
	    $(LIBCORE) $(LDLIBS_CORE)

test-build: all $(UNIT_BIN) $(TOOL_BIN)

deps:
	@sh tools/deps.sh

# Every test: the layer check, unit tests (built with $(CC), again under
# ASan+UBSan, again with clang), the fuzz targets for a bounded number of
# runs, reference checks against scipy/numpy, and integration tests
# against real servers. Each leg's directory is passed to run.sh, which
# fails the run when a leg it was given has no binaries. The four builds
# use every core unless make was given its own -j.
CHECK_JOBS = $(if $(filter -j%,$(MAKEFLAGS)),,-j$(shell nproc 2>/dev/null))
check: deps
	@$(MAKE) --no-print-directory $(CHECK_JOBS) test-build
	@$(MAKE) --no-print-directory $(CHECK_JOBS) SAN=1 BUILD=$(BUILD)/san \
	    test-build
	@$(MAKE) --no-print-directory $(CHECK_JOBS) CC=clang \
	    BUILD=$(BUILD)/clang test-build
	@$(MAKE) --no-print-directory $(CHECK_JOBS) fuzz
	@sh tests/run.sh --san $(BUILD)/san --clang $(BUILD)/clang \
	    --fuzz $(BUILD)/fuzz $(BUILD)

# Unit tests only, no install step (for quick iteration).
unit: test-build
	@sh tests/run.sh --unit-only $(BUILD)

demo: deps
	@$(MAKE) --no-print-directory all
	@sh tools/demo.sh $(BUILD)

bench: deps
	@$(MAKE) --no-print-directory test-build
	@sh bench/run.sh $(BUILD)

# libFuzzer targets into $(BUILD)/fuzz (clang); tests/fuzz/run.sh runs
# one on its seeds (tests/fuzz/corpus/<target>/) for a bounded time.
fuzz:
	@$(MAKE) --no-print-directory FUZZ=1 CC=clang BUILD=$(BUILD)/fuzz \
	    fuzz-build

fuzz-build: $(FUZZ_BIN)

# What install puts where (uninstall removes the same list). The
# configuration installed is a neutral template (conf/template.conf), not
# the demo's scenario (conf/stopcock.conf); an existing one is kept, and
# uninstall leaves it (it is the operator's).
MANDIR		= $(PREFIX)/share/man
INSTALLED	= $(PREFIX)/bin/stopcock $(PREFIX)/sbin/stopcockd \
		  $(MANDIR)/man1/stopcock.1 $(MANDIR)/man5/stopcock.conf.5 \
		  $(MANDIR)/man8/stopcockd.8 \
		  $(PREFIX)/lib/systemd/system/stopcockd.service \
		  $(PREFIX)/lib/sysusers.d/stopcock.conf \
		  /etc/logrotate.d/stopcock

install: all
	install -d $(DESTDIR)$(PREFIX)/bin $(DESTDIR)$(PREFIX)/sbin \
	    $(DESTDIR)/etc/stopcock $(DESTDIR)$(PREFIX)/lib/systemd/system \
	    $(DESTDIR)$(MANDIR)/man1 $(DESTDIR)$(MANDIR)/man5 \
	    $(DESTDIR)$(MANDIR)/man8 $(DESTDIR)/etc/logrotate.d
	install -m 755 $(BUILD)/stopcock $(DESTDIR)$(PREFIX)/bin/stopcock
	install -m 755 $(BUILD)/stopcockd $(DESTDIR)$(PREFIX)/sbin/stopcockd
	install -m 644 man/stopcock.1 $(DESTDIR)$(MANDIR)/man1/stopcock.1
	install -m 644 man/stopcock.conf.5 \
	    $(DESTDIR)$(MANDIR)/man5/stopcock.conf.5
	install -m 644 man/stopcockd.8 $(DESTDIR)$(MANDIR)/man8/stopcockd.8
	install -m 644 conf/logrotate $(DESTDIR)/etc/logrotate.d/stopcock
	test -e $(DESTDIR)/etc/stopcock/stopcock.conf || \
	    install -m 640 conf/template.conf $(DESTDIR)/etc/stopcock/stopcock.conf
	sed 's|@SBINDIR@|$(PREFIX)/sbin|g' systemd/stopcockd.service > \
	    $(DESTDIR)$(PREFIX)/lib/systemd/system/stopcockd.service
	chmod 644 $(DESTDIR)$(PREFIX)/lib/systemd/system/stopcockd.service
	install -d $(DESTDIR)$(PREFIX)/lib/sysusers.d
	install -m 644 systemd/stopcock.sysusers \
	    $(DESTDIR)$(PREFIX)/lib/sysusers.d/stopcock.conf
	# on a live system: create the user and let it read the config
	if [ -z "$(DESTDIR)" ] && [ "$$(id -u)" = 0 ] && \
	    command -v systemd-sysusers >/dev/null; then \
		systemd-sysusers $(PREFIX)/lib/sysusers.d/stopcock.conf && \
		chgrp stopcock /etc/stopcock/stopcock.conf; \
	fi

uninstall:
	for f in $(INSTALLED); do rm -f "$(DESTDIR)$$f"; done
	rmdir "$(DESTDIR)/etc/stopcock" 2>/dev/null || true
	@echo "kept: $(DESTDIR)/etc/stopcock/stopcock.conf (if present) and" \
	    "the state in /var/lib/stopcock"

clean:
	rm -rf build

-include $(shell find $(BUILD)/obj -name '*.d' 2>/dev/null)
