"""Test-session set-up shared by every test folder."""

from wmplan._alloc import tune_malloc

tune_malloc()  # the allocator settings the `wmplan` command uses (fewer page faults; WMPLAN_MALLOC_TUNING=0 opts out)
