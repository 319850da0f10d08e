"""The store: typed SQLAlchemy 2 mapping of what Keelson keeps.

Rows are named for what they are (``ModelRow``, ``RecordRow`` ...): the word
*model* belongs to the domain, so the declarative base is ``Base``.
Alembic (migrations/) is the only way this schema reaches a database; change a
class in this package, then add a numbered revision. One module per part:
base (the declarative base and shared column types), core (models, trainers,
records, versions, history, jobs, tokens), monitoring (scored cases, live
metrics, drift tallies), site (the pages' secrets and ended sessions).
"""

from service.store.tables.base import (
    NAMING_CONVENTION,
    Base,
    BigId,
    LabelJSON,
    TextJSON,
    utcnow,
)
from service.store.tables.core import (
    JobRow,
    ModelEventRow,
    ModelRow,
    RecordRow,
    TokenRow,
    TrainerRow,
    VersionRow,
    tombstone_name,
)
from service.store.tables.monitoring import (
    DriftTallyRow,
    ScoredCaseRow,
    Sum,
    TrackRecordAlarmRow,
    TrackRecordDayRow,
)
from service.store.tables.site import EndedSessionRow, SiteSecretRow

__all__ = [
    "NAMING_CONVENTION", "Base", "BigId", "DriftTallyRow", "EndedSessionRow", "JobRow",
    "LabelJSON", "ModelEventRow", "ModelRow", "RecordRow", "ScoredCaseRow", "SiteSecretRow",
    "Sum", "TextJSON", "TokenRow", "TrackRecordAlarmRow", "TrackRecordDayRow", "TrainerRow",
    "VersionRow", "tombstone_name", "utcnow",
]
