"""The exception family of codeseek.

Every error a user can cause or meet is a :class:`CodeseekError`; the command
line turns one into a single ``error: ...`` line and a non-zero exit status.
Third-party errors (sqlite3, hnswlib, tree-sitter, onnxruntime) are translated
where they are raised, with ``raise ... from exc``.

::

    CodeseekError
    ├── ConfigError              a bad setting in codeseek.toml or the environment
    ├── RepositoryNotFound       the path to index or search is not a folder
    ├── IndexNotFound            no index has been built for this repository yet
    ├── IndexCorrupt             the SQLite store cannot be read; rebuild it
    ├── IndexFormatMismatch      the index was written by another format version
    ├── IndexLocked              another process holds the index for writing
    ├── IndexWriteError          the index could not be written (disk full, ...)
    ├── IndexFolderUnsafe        the index folder is a link, another user's, open to others'
    │                            writes, holds a link, or holds files that are not an index
    ├── FileRefused              a file read by name (settings, ignore file, source) is a
    │                            link, not a regular file (a FIFO) or over its size cap
    ├── IndexBuilding            the index is being built (or its first build was cut short)
    ├── ModelUnavailable         the embedding model folder is missing or broken
    ├── ModelMismatch            the index was built with another model
    ├── UnsupportedLanguage      a language name codeseek does not know
    ├── InvalidQuery             an empty query or a bad filter
    ├── UsageError               a command-line value or combination that cannot be used
    │                            (the command line exits with status 2)
    ├── InvalidSplit             a held-out share outside (0, 1], or a split other than
    │                            the one the index's query adapter was trained on
    ├── TooFewExamples           too few documented units (or too small a batch) to check
    │                            or tune on
    ├── ReportWriteError         the recall checks' HTML report could not be written
    ├── QuestionFileError        a question file is missing, unreadable or malformed
    ├── DaemonError              a running daemon broke off, timed out or answered garbage
    └── ClusterError             ``index --ray``: Ray is not installed, the cluster cannot be
                                 reached, or a worker failed
"""

from __future__ import annotations


class CodeseekError(Exception):
    """Base class: a condition the user can read about and act on."""


class ConfigError(CodeseekError):
    """A setting in codeseek.toml or an environment variable is invalid."""


class RepositoryNotFound(CodeseekError):
    """The repository path does not exist or is not a folder."""


class IndexNotFound(CodeseekError):
    """No index exists yet for the repository."""


class IndexCorrupt(CodeseekError):
    """The index store cannot be read."""


class IndexFormatMismatch(CodeseekError):
    """The index on disk was written by an incompatible version of codeseek."""


class IndexLocked(CodeseekError):
    """Another process is writing the index."""


class IndexWriteError(CodeseekError):
    """Writing the index failed (for example, the disk is full)."""


class IndexFolderUnsafe(CodeseekError):
    """The index folder (or a file in it) cannot be used without risk to other files."""


class FileRefused(CodeseekError):
    """A file codeseek reads by name (a setting or ignore file, a source file) is a link,
    not a regular file (a FIFO would block) or larger than the cap for it."""


class IndexBuilding(CodeseekError):
    """The index has no finished build yet: one runs now, or the last one was cut short."""


class ModelUnavailable(CodeseekError):
    """The embedding model cannot be found or loaded."""


class ModelMismatch(CodeseekError):
    """The index holds vectors of a different model than the one requested."""


class UnsupportedLanguage(CodeseekError):
    """A language name that is not in the registry."""


class InvalidQuery(CodeseekError):
    """The query or one of its filters cannot be used."""


class UsageError(CodeseekError):
    """A command-line value, or a combination of them, that cannot be used."""


class InvalidSplit(CodeseekError):
    """A held-out share that cannot be used, or one the adapter was not trained with."""


class TooFewExamples(CodeseekError):
    """The repository has too few documented units for recall checks or tuning."""


class ReportWriteError(CodeseekError):
    """The HTML report of the recall checks could not be written."""


class QuestionFileError(CodeseekError):
    """A question file (``codeseek eval --questions``) cannot be read or is malformed."""


class DaemonError(CodeseekError):
    """A daemon listens on the index's socket but failed to answer a request."""


class ClusterError(CodeseekError):
    """Indexing on Ray cannot go on: no Ray, no cluster at the address, a worker failed."""


def error_class(name: str) -> type[CodeseekError] | None:
    """The class of the family named ``name`` (how the daemon names an error it
    answers with), or None when none is."""
    found: list[type[CodeseekError]] = [CodeseekError]
    while found:
        cls = found.pop()
        if cls.__name__ == name:
            return cls
        found.extend(cls.__subclasses__())
    return None
