"""Job phases: the UWS 1.1 ones (§2.1.3) plus the ones that exist only on this side.

A record starts ``UNSENT`` (waiting for a free slot under the per-service limit, or about to be
created on the service) and becomes ``SUBMITTED`` once the service has given it a job URL; from
then on it carries the phase the service reports. A record the service could not be reached
for, try after try, ends ``UNREACHED``: no job exists on the service.
"""

PENDING = "PENDING"
QUEUED = "QUEUED"
EXECUTING = "EXECUTING"
COMPLETED = "COMPLETED"
ERROR = "ERROR"
ABORTED = "ABORTED"
UNKNOWN = "UNKNOWN"
HELD = "HELD"
SUSPENDED = "SUSPENDED"
ARCHIVED = "ARCHIVED"

# Our own, never sent to a service.
UNSENT = "UNSENT"        # recorded here, not yet sent to the service (waiting for a slot)
SUBMITTED = "SUBMITTED"  # created on the service, phase not yet read back
LOST = "LOST"            # the service no longer knows the job and no result was saved
UNREACHED = "UNREACHED"  # the service was never reached; no job exists on it

UWS_PHASES = (PENDING, QUEUED, EXECUTING, COMPLETED, ERROR, ABORTED, UNKNOWN, HELD, SUSPENDED,
              ARCHIVED)

# Terminal for a client (UWS 1.1 §2.1.3): nothing more will happen on the service.
TERMINAL = frozenset({COMPLETED, ERROR, ABORTED, ARCHIVED, LOST, UNREACHED})
# Ended without a result: every terminal phase but COMPLETED.
FAILED = TERMINAL - {COMPLETED}
# Still worth waiting for.
ACTIVE = frozenset({UNSENT, SUBMITTED, PENDING, QUEUED, EXECUTING, UNKNOWN, HELD, SUSPENDED})
# Holding one of the service's run slots. HELD does not: the service waits for the client to
# send RUN again (UWS 1.1 §2.1.3), which jobdesk does only when a slot is free.
RUNNING = frozenset({SUBMITTED, QUEUED, EXECUTING, UNKNOWN, SUSPENDED})
