"""jobdesk: durable, cached, provenance-carrying TAP query jobs for Jupyter."""

from jobdesk.errors import (
    CacheCorrupt, JobAborted, JobdeskError, JobFailed, JobLost, QueryRejected, ResultTruncated,
    ServiceError, ServiceRefused, ServiceUnreachable, WaitTimeout,
)

__version__ = "0.1.0"

__all__ = [
    "CacheCorrupt", "JobAborted", "JobdeskError", "JobFailed", "JobLost", "QueryRejected",
    "ResultTruncated", "ServiceError", "ServiceRefused", "ServiceUnreachable", "WaitTimeout",
    "__version__",
]
