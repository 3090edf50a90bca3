"""jobdesk: durable, cached, provenance-carrying TAP query jobs for Jupyter.

    >>> from jobdesk import Desk
    >>> desk = Desk()
    >>> job = desk.submit("http://127.0.0.1:8787/tap", "SELECT TOP 10 * FROM orrery.sources")
    >>> table = job.wait().table()
"""

from jobdesk.desk import Desk, Job
from jobdesk.groups import Group
from jobdesk.errors import (
    BadServiceURL, CacheCorrupt, JobAborted, JobdeskError, JobFailed, JobLost,
    NotRepeatableWarning, QueryRejected, ResultTruncated, ResultUnavailable, ServiceError,
    ServiceRefused, ServiceResponseInvalid, ServiceUnreachable, StorageFull,
    TruncatedResultWarning, UploadInvalid, WaitTimeout,
)

__version__ = "0.1.0"

__all__ = [
    "BadServiceURL", "CacheCorrupt", "Desk", "Group", "Job", "JobAborted", "JobdeskError", "JobFailed",
    "JobLost", "NotRepeatableWarning", "QueryRejected", "ResultTruncated", "ResultUnavailable",
    "ServiceError", "ServiceRefused", "ServiceResponseInvalid", "ServiceUnreachable",
    "StorageFull", "TruncatedResultWarning", "UploadInvalid", "WaitTimeout", "__version__",
]
