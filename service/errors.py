"""The errors the service raises on purpose: one hierarchy, below ServiceError.

Code below the API raises these (or the solver's errors, solver.errors); it never names an HTTP
status. The API layer maps each class to a problem type by one table (service.problems,
PROBLEM_OF), the CLI prints the message of a UsageError (or an InputError) as one line.

    ServiceError
    ├── UsageError               the CLI's: bad arguments or files, one line, exit code 2
    ├── InputError (ValueError)  a request that does not fit the network; `errors` pairs
    │   │                        where (a JSON pointer or a query parameter) with what is wrong
    │   ├── AnalysisInputError   simulation / what-if parameters (pointers into the body)
    │   ├── PlaneError           the axes and fixed stock of a picture (query parameters)
    │   ├── HistoryInputError    sales history rows (pointers into the JSON or CSV upload)
    │   ├── ClosingInputError    a closing count's date or units (pointers as the API's)
    │   ├── ItemUploadError      an assortment's item upload (pointers to lines and columns)
    │   └── ClosingCountsError   an assortment's closing report or bulk stocks
    ├── UnknownLocationError     the network has no such location (LookupError)
    ├── UnknownJobError          no such job of the tenant, or not of the kind asked for
    ├── AnalysisCapError         too many simulations and comparisons live; `retry_after`
    ├── ClosingConflictError     a count after the instructions were issued, or instructions
    │                            asked for before every count is in (`missing`)
    ├── StockProblemsError       closing stock that does not fit the network (also the
    │                            solver's InvalidStockError); `problems` by location
    ├── UnknownNetworkError      missing, archived or another tenant's network (LookupError)
    ├── UnknownNetworkChoice     the status page's ?network= names no network (LookupError)
    ├── NetworkNameTakenError    another of the tenant's networks has the name
    ├── NetworkArchivedError     a write to an archived network (the CLI's import)
    ├── NothingToApplyError      calibration apply with no estimate, or none that changes
    ├── SettingsConflictError    calibration settings the stored history breaks (`days`)
    ├── ConcurrentUploadError    another upload stored the same days at the same moment
    ├── PolicyNotReadyError      no ready policy yet; `job_state` of the solve
    │   └── PolicyNotSolvedError no solve will produce it; `criteria` in use
    ├── CorruptPolicyError       a stored policy failed its checksum or decoding
    ├── AssortmentExistsError    another of the tenant's assortments has the name
    ├── NoItemsError             an assortment without items asked to calibrate them
    ├── LeaseLostError           the worker's lease expired before it stored a job's result
    ├── PickListIssuedError      a closing report for a night whose pick lists are issued
    ├── PickListNotReadyError    not every location has reported; `missing` names them
    └── DatabaseNotMigratedError the schema is not the one this code expects (RuntimeError)
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import date

from solver import InvalidStockError

__all__ = [
    "AnalysisCapError",
    "AnalysisInputError",
    "AssortmentExistsError",
    "ClosingConflictError",
    "ClosingCountsError",
    "ClosingInputError",
    "ConcurrentUploadError",
    "CorruptPolicyError",
    "DatabaseNotMigratedError",
    "HistoryInputError",
    "InputError",
    "ItemUploadError",
    "LeaseLostError",
    "NetworkArchivedError",
    "NetworkNameTakenError",
    "NoItemsError",
    "NothingToApplyError",
    "PickListIssuedError",
    "PickListNotReadyError",
    "PlaneError",
    "PolicyNotReadyError",
    "PolicyNotSolvedError",
    "ServiceError",
    "SettingsConflictError",
    "StockProblemsError",
    "UnknownJobError",
    "UnknownLocationError",
    "UnknownNetworkChoice",
    "UnknownNetworkError",
    "UsageError",
]


class ServiceError(Exception):
    """Base class of every error the service raises on purpose."""


class UsageError(ServiceError):
    """Bad input from the user: the CLI reports it as one line and exits with code 2."""


class InputError(ServiceError, ValueError):
    """Input that does not fit the network; `errors` pairs where it is wrong (a JSON pointer
    into a request body, or a query parameter) with what is wrong there; the message joins
    them unless given."""

    def __init__(self, errors: Sequence[tuple[str, str]], message: str | None = None) -> None:
        super().__init__(message or "; ".join(f"{where}: {what}" for where, what in errors))
        self.errors = list(errors)


class AnalysisInputError(InputError):
    """Simulation or what-if parameters that do not fit the network; `errors` pairs a JSON
    pointer into the request body with what is wrong there."""


class PlaneError(InputError):
    """Axis or fixed-stock choices of a picture that do not fit the network; `errors` pairs
    each query parameter ("x", "y" or "at") with what is wrong with it."""


class HistoryInputError(InputError):
    """Sales history that cannot be stored; `errors` pairs a pointer into the upload (e.g.
    "/rows/3/date", or "/line/7/units_sold" in a CSV) with what is wrong there. The message
    names the first 20 and says that nothing of the upload was stored."""

    SHOWN = 20

    def __init__(self, errors: Sequence[tuple[str, str]]) -> None:
        shown = list(errors)[: self.SHOWN]
        super().__init__(shown)
        more = f" (and {len(errors) - self.SHOWN} more)" if len(errors) > self.SHOWN else ""
        # Nothing of a refused upload is stored: the client still holds every row, and sends
        # the whole upload again once the rows named are fixed.
        self.args = (
            "; ".join(f"{pointer}: {text}" for pointer, text in shown)
            + more
            + "; nothing of this upload was stored",
        )


class ClosingInputError(InputError):
    """A closing count's business date or units that do not fit the network; `errors` pairs a
    pointer (into the body, or "query:/business_date") with what is wrong there."""

    def __init__(self, message: str, errors: Sequence[tuple[str, str]]) -> None:
        super().__init__(errors, message)


class UnknownLocationError(ServiceError, LookupError):
    """The network has no location of that id."""


class UnknownJobError(ServiceError, LookupError):
    """No job of that id for the tenant (or of the network), or one of another kind."""


class AnalysisCapError(ServiceError):
    """The tenant has as many simulations and what-if comparisons queued or running as it may;
    `retry_after`: seconds worth waiting (text, as in the Retry-After header)."""

    def __init__(self, message: str, *, retry_after: str) -> None:
        super().__init__(message)
        self.retry_after = retry_after


class ClosingConflictError(ServiceError):
    """A count sent after the night's instructions were issued (not as a correction), or the
    instructions asked for before every location has reported (`missing` names those)."""

    def __init__(self, message: str, *, missing: list[str] | None = None) -> None:
        super().__init__(message)
        self.missing = missing


class StockProblemsError(ServiceError, InvalidStockError):
    """Closing stock that does not fit the network; `problems` pairs each offending location
    with what is wrong there."""

    def __init__(self, problems: list[tuple[str, str]]) -> None:
        super().__init__("; ".join(f"{location}: {what}" for location, what in problems))
        self.problems = problems


class UnknownNetworkError(ServiceError, LookupError):
    """The network is missing, archived, or another tenant's (which looks exactly the same)."""


class UnknownNetworkChoice(ServiceError, LookupError):
    """The status page's `?network=` names no network of the tenant (or an archived one)."""


class NetworkNameTakenError(ServiceError):
    """Another network of the tenant has the name asked for."""


class NetworkArchivedError(ServiceError):
    """The network is archived: it is kept, but accepts nothing more."""


class NothingToApplyError(ServiceError):
    """Calibration apply finds no location to estimate, or estimates equal to the current
    version's parameters."""


class SettingsConflictError(ServiceError):
    """Calibration settings that days of the stored history would break; `days` names the
    first of them as (location, date)."""

    def __init__(self, message: str, *, days: list[tuple[str, date]]) -> None:
        super().__init__(message)
        self.days = days


class ConcurrentUploadError(ServiceError):
    """Another upload stored some of the same days at the same moment; send this one again."""


class PolicyNotReadyError(ServiceError):
    """No version of the network has a ready policy for the criterion yet."""

    def __init__(self, message: str, *, job_state: str | None) -> None:
        super().__init__(message)
        self.job_state = job_state


class PolicyNotSolvedError(PolicyNotReadyError):
    """No job will produce the asked policy: the current version is not solved for the
    criterion (not requested, or its solve failed). `criteria` are those it is solved or being
    solved for. (A kind of PolicyNotReadyError, so that whoever only skips unready policies
    skips these too.)"""

    def __init__(self, message: str, *, criteria: list[str], job_state: str | None) -> None:
        super().__init__(message, job_state=job_state)
        self.criteria = criteria


class CorruptPolicyError(ServiceError):
    """A stored policy failed its checksum or could not be decoded."""


class DatabaseNotMigratedError(ServiceError, RuntimeError):
    """The database schema is not the one this code expects."""


class ItemUploadError(InputError):
    """An upload of an assortment's items that is refused whole; `errors` pairs a pointer to
    the line (and column) with what is wrong there, in upload order."""


class ClosingCountsError(InputError):
    """A closing report, or the stocks of a bulk request, that does not fit the assortment;
    `errors` pairs a pointer into the upload with what is wrong there."""


class AssortmentExistsError(ServiceError):
    """Another assortment of the tenant has the name."""


class PickListIssuedError(ServiceError):
    """The night's pick lists are issued: only a correction changes a count now."""


class PickListNotReadyError(ServiceError):
    """The night's pick lists wait for every location's report; `missing` names those still to
    report."""

    def __init__(self, message: str, missing: list[str]) -> None:
        super().__init__(message)
        self.missing = missing


class NoItemsError(ServiceError):
    """The assortment has no items (to calibrate)."""


class LeaseLostError(ServiceError):
    """A worker's lease on its job expired before the result was stored: another worker owns
    the job now, and what this one computed is dropped (its transaction rolled back)."""
