# scenemon firmware-side check: `make check` builds check_fe with the shipped front end and
# runs it on the golden vectors in this folder (exit 0 within tolerance).
CC ?= cc
CFLAGS ?= -std=c99 -O2 -Wall -Wextra -Werror -pedantic -ffp-contract=off
# the float front end (frontend.c) or the fixed-point one (frontend_q15.c), as the header says
FRONTEND := $(if $(shell grep -l 'define SM_ARITHMETIC_Q15 1' frontend_constants.h),frontend_q15.c,frontend.c)

check: check_fe
	./check_fe

check_fe: check.c $(FRONTEND) frontend.h frontend_constants.h check_params.h
	$(CC) $(CFLAGS) -I. $(FRONTEND) check.c -o $@ -lm

clean:
	rm -f check_fe

.PHONY: check clean
