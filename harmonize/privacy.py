"""Pseudonymisation of people and vessels: names never leave the tool unhashed."""

from __future__ import annotations

import hashlib
import secrets
from pathlib import Path

import pandas as pd

SALT_FILE = ".harmonize-salt"


def study_salt(study_root: Path) -> str:
    """The study's secret salt, created on first use (kept in the study folder, not the store).

    A salt makes the hashes useless for looking a known name up by hashing it; keep the
    file private and do not share it with the store.
    """
    path = Path(study_root) / SALT_FILE
    if not path.is_file():
        path.write_text(secrets.token_hex(16), encoding="utf-8")
        try:
            path.chmod(0o600)
        except OSError:
            pass
    return path.read_text(encoding="utf-8").strip()


def pseudonymise(values: pd.Series, salt: str, prefix: str = "obs") -> pd.Series:
    """Salted SHA-256 pseudonyms ("obs-<16 hex>") of names; nulls stay null.

    Names are compared case- and whitespace-insensitively, so "A. Smith " and "a. smith"
    get the same pseudonym. Hashing runs once per distinct name.
    """
    text = values.astype("string").str.strip().str.replace(r"\s+", " ", regex=True).str.casefold()
    distinct = text.dropna().unique()
    table = {
        name: f"{prefix}-" + hashlib.sha256(f"{salt}|{name}".encode()).hexdigest()[:16] for name in distinct
    }
    return text.map(table).astype("string")
