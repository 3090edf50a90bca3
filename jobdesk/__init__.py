"""jobdesk: durable, cached, provenance-carrying TAP query jobs for Jupyter.

    >>> from jobdesk import Desk
    >>> desk = Desk()
    >>> job = desk.submit("http://127.0.0.1:8787/tap", "SELECT TOP 10 * FROM orrery.sources")
    >>> table = job.wait().table()
"""

from jobdesk.desk import Desk, Job
from jobdesk.groups import Group
from jobdesk.errors import (
    AnalysisError, AnalysisNotFound, CompareKeyInvalid, PlanNotFound, RenameInvalid,
    BadServiceURL, CacheCorrupt, ConfigError, ExportRefused, ExportTargetExists, ExportWarning,
    GroupCacheWarning, IndexBusy, JobAborted, JobdeskError, JobFailed, JobLost, JobNotFound,
    JobIdAmbiguous, JobUnreached, NotATapService, NotRepeatableWarning, PublishRefused, QueryEmpty,
    QueryRejected, QuickLookUnavailable, ResultTruncated, ResultTruncatedWarning,
    ResultUnavailable, ServiceError, ServiceRefused, ServiceResponseInvalid, ServiceUnreachable,
    StorageFull, UploadInvalid, WaitTimeout,
    MetadataUnavailable, MetadataWarning, QueryCheckWarning, SyncTimeout, UnknownTable,
    deprecated_alias as _deprecated_alias,
)

__version__ = "0.1.0"

__all__ = [
    "AnalysisError", "AnalysisNotFound", "CompareKeyInvalid", "PlanNotFound", "RenameInvalid",
    "BadServiceURL", "CacheCorrupt", "ConfigError", "Desk", "ExportRefused", "ExportTargetExists",
    "ExportWarning", "Group", "GroupCacheWarning", "IndexBusy", "Job", "JobAborted", "JobdeskError",
    "JobFailed", "JobIdAmbiguous", "JobLost", "JobNotFound", "JobUnreached", "NotATapService",
    "NotRepeatableWarning", "PublishRefused", "QueryEmpty", "QueryRejected",
    "QuickLookUnavailable", "ResultTruncated", "ResultTruncatedWarning", "ResultUnavailable",
    "ServiceError", "ServiceRefused", "ServiceResponseInvalid", "ServiceUnreachable", "StorageFull",
    "UploadInvalid", "WaitTimeout", "__version__",
    "MetadataUnavailable", "MetadataWarning", "QueryCheckWarning", "SyncTimeout", "UnknownTable",
]


def __getattr__(name: str):
    # Old public names (``TruncatedResultWarning``) still resolve, with a DeprecationWarning.
    return _deprecated_alias(__name__, name, globals())
