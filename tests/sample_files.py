"""What sample_repo/ holds, found without codeseek (the reference for counts)."""

from __future__ import annotations

from pathlib import Path

SAMPLE_REPO = Path(__file__).resolve().parent.parent / "sample_repo"

SOURCE_SUFFIXES = {".py": "python", ".js": "javascript", ".ts": "typescript", ".tsx": "tsx",
                   ".go": "go", ".rs": "rust", ".java": "java", ".c": "c", ".cpp": "cpp",
                   ".rb": "ruby"}


def sample_source_files() -> dict[str, str]:
    """sample_repo's source files (path -> language), found without codeseek: every file
    with a source suffix outside the folder its .gitignore lists (build/)."""
    found = {}
    for path in SAMPLE_REPO.rglob("*"):
        rel = path.relative_to(SAMPLE_REPO)
        if path.is_file() and path.suffix in SOURCE_SUFFIXES and rel.parts[0] != "build":
            found[rel.as_posix()] = SOURCE_SUFFIXES[path.suffix]
    return found
