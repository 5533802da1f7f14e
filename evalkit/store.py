"""SQLite store of a run: conditions, records (one row each, committed as it completes), verdicts.

Also the generation cache, a separate SQLite file shared by runs, keyed by everything that
determines a completion (model file hash, dtype, prompt text, decoding limits).
"""

from __future__ import annotations

import hashlib
import json
import sqlite3
import time
from contextlib import closing
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Iterable, Iterator

from .errors import StoreError

__all__ = ["Record", "RunStore", "GenerationCache", "STORE_NAME", "cache_key"]

STORE_NAME = "store.sqlite"
SCHEMA_VERSION = 1

_RUN_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS conditions (
    condition_id TEXT PRIMARY KEY,
    label TEXT NOT NULL,
    task TEXT NOT NULL,
    model TEXT NOT NULL,
    style TEXT NOT NULL,
    shots INTEGER NOT NULL,
    draw INTEGER NOT NULL,
    seed INTEGER NOT NULL,
    settings TEXT NOT NULL          -- JSON: exemplar ids, template hash, decoding limits, model hash
);
CREATE TABLE IF NOT EXISTS records (
    condition_id TEXT NOT NULL REFERENCES conditions(condition_id),
    question_id TEXT NOT NULL,
    question TEXT NOT NULL,
    gold TEXT NOT NULL,
    grp TEXT,
    prompt_sha TEXT NOT NULL,
    prompt TEXT NOT NULL,
    completion TEXT NOT NULL,
    extracted TEXT,
    extracted_raw TEXT,
    method TEXT NOT NULL,
    correct INTEGER NOT NULL,
    outcome TEXT NOT NULL,
    prompt_tokens INTEGER NOT NULL,
    new_tokens INTEGER NOT NULL,
    seconds REAL NOT NULL,
    min_margin REAL,
    finish TEXT NOT NULL,
    cached INTEGER NOT NULL,
    extra TEXT NOT NULL DEFAULT '{}',   -- JSON: backend facts, e.g. calculator interventions
    created REAL NOT NULL,
    PRIMARY KEY (condition_id, question_id)
);
CREATE TABLE IF NOT EXISTS costs (
    condition_id TEXT PRIMARY KEY,
    wall_seconds REAL NOT NULL,     -- summed over sessions (a resumed condition adds its new time)
    peak_rss_bytes INTEGER NOT NULL -- largest resident memory of the process seen while it ran
);
CREATE TABLE IF NOT EXISTS verdicts (
    condition_id TEXT NOT NULL,
    question_id TEXT NOT NULL,
    verdict TEXT NOT NULL,
    detail TEXT NOT NULL,           -- JSON: steps, first wrong step, repaired answer, explanation
    PRIMARY KEY (condition_id, question_id)
);
"""


@dataclass(frozen=True)
class Record:
    """One question under one condition."""

    condition_id: str
    question_id: str
    question: str
    gold: str
    grp: str | None
    prompt_sha: str
    prompt: str
    completion: str
    extracted: str | None
    extracted_raw: str | None
    method: str
    correct: bool
    outcome: str
    prompt_tokens: int
    new_tokens: int
    seconds: float
    min_margin: float | None
    finish: str
    cached: bool
    extra: dict = field(default_factory=dict)
    created: float = 0.0


_RECORD_FIELDS = [f.name for f in fields(Record)]


def _connect(path: Path) -> sqlite3.Connection:
    try:
        con = sqlite3.connect(path, timeout=30.0)
    except sqlite3.Error as e:
        raise StoreError(f"{path}: cannot open the store: {e}") from None
    con.execute("PRAGMA journal_mode=WAL")
    con.execute("PRAGMA synchronous=NORMAL")
    return con


class RunStore:
    """The store of one run folder."""

    def __init__(self, path: str | Path, create: bool = True):
        self.path = Path(path)
        if not create and not self.path.is_file():
            raise StoreError(f"{self.path}: no store here; is this a run folder made by 'evalkit run'?")
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.con = _connect(self.path)
        with self.con:
            self.con.executescript(_RUN_SCHEMA)
            self.con.execute(
                "INSERT OR IGNORE INTO meta VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),)
            )
        version = self.get_meta("schema_version")
        if str(version) != str(SCHEMA_VERSION):
            raise StoreError(f"{self.path}: store schema {version}, this evalkit reads {SCHEMA_VERSION}")

    @classmethod
    def open_run(cls, run_dir: str | Path) -> "RunStore":
        """Open the store of an existing run folder."""
        return cls(Path(run_dir) / STORE_NAME, create=False)

    def close(self) -> None:
        self.con.close()

    def __enter__(self) -> "RunStore":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # meta
    def set_meta(self, key: str, value) -> None:
        with self.con:
            self.con.execute("INSERT OR REPLACE INTO meta VALUES (?, ?)", (key, json.dumps(value)))

    def get_meta(self, key: str, default=None):
        row = self.con.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        if row is None:
            return default
        try:
            return json.loads(row[0])
        except json.JSONDecodeError:
            return row[0]

    # conditions
    def add_condition(self, condition_id: str, label: str, task: str, model: str, style: str,
                      shots: int, draw: int, seed: int, settings: dict) -> None:
        """Register a condition; a condition id already present must carry the same settings."""
        blob = json.dumps(settings, sort_keys=True)
        row = self.con.execute(
            "SELECT settings FROM conditions WHERE condition_id = ?", (condition_id,)
        ).fetchone()
        if row is not None:
            if row[0] != blob:
                raise StoreError(
                    f"{self.path}: condition '{label}' was run with other settings; "
                    "resume with the same study, or write to a new run folder with --out"
                )
            return
        with self.con:
            self.con.execute(
                "INSERT INTO conditions VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (condition_id, label, task, model, style, shots, draw, seed, blob),
            )

    def conditions(self):
        import pandas as pd

        df = pd.read_sql_query("SELECT * FROM conditions ORDER BY rowid", self.con)
        df["settings"] = df["settings"].map(json.loads)
        return df

    # records
    def done_ids(self, condition_id: str) -> set[str]:
        rows = self.con.execute("SELECT question_id FROM records WHERE condition_id = ?", (condition_id,))
        return {r[0] for r in rows}

    def add_record(self, record: Record) -> None:
        """Insert one record in its own transaction: it is either fully there or not at all."""
        values = asdict(record)
        values["created"] = values["created"] or time.time()
        values["correct"] = int(values["correct"])
        values["cached"] = int(values["cached"])
        values["extra"] = json.dumps(values["extra"], sort_keys=True)
        with self.con:
            self.con.execute(
                f"INSERT OR REPLACE INTO records ({', '.join(_RECORD_FIELDS)}) "
                f"VALUES ({', '.join('?' * len(_RECORD_FIELDS))})",
                [values[f] for f in _RECORD_FIELDS],
            )

    def iter_records(self) -> Iterator[Record]:
        cur = self.con.execute(f"SELECT {', '.join(_RECORD_FIELDS)} FROM records ORDER BY condition_id, question_id")
        for row in cur:
            d = dict(zip(_RECORD_FIELDS, row))
            d["correct"], d["cached"] = bool(d["correct"]), bool(d["cached"])
            d["extra"] = json.loads(d["extra"])
            yield Record(**d)

    def records(self):
        """All records joined with their condition, as a DataFrame."""
        import pandas as pd

        df = pd.read_sql_query(
            "SELECT c.label AS condition, c.task, c.model, c.style, c.shots, c.draw, c.seed, r.* "
            "FROM records r JOIN conditions c USING (condition_id) ORDER BY c.rowid, r.question_id",
            self.con,
        )
        df["correct"] = df["correct"].astype(bool)
        df["cached"] = df["cached"].astype(bool)
        df["extra"] = df["extra"].map(json.loads)
        return df.rename(columns={"grp": "group"})

    def count(self) -> int:
        return self.con.execute("SELECT COUNT(*) FROM records").fetchone()[0]

    # costs
    def add_cost(self, condition_id: str, wall_seconds: float, peak_rss_bytes: int) -> None:
        """Add a session's wall time to a condition and keep the larger memory peak."""
        with self.con:
            self.con.execute(
                "INSERT INTO costs VALUES (?, ?, ?) ON CONFLICT(condition_id) DO UPDATE SET "
                "wall_seconds = wall_seconds + excluded.wall_seconds, "
                "peak_rss_bytes = MAX(peak_rss_bytes, excluded.peak_rss_bytes)",
                (condition_id, float(wall_seconds), int(peak_rss_bytes)),
            )

    def costs(self):
        import pandas as pd

        return pd.read_sql_query("SELECT * FROM costs", self.con)

    # verdicts
    def put_verdicts(self, rows: Iterable[tuple[str, str, str, dict]]) -> int:
        """Replace verdicts (condition_id, question_id, verdict, detail) in one transaction."""
        rows = [(c, q, v, json.dumps(d, sort_keys=True)) for c, q, v, d in rows]
        with self.con:
            self.con.executemany("INSERT OR REPLACE INTO verdicts VALUES (?, ?, ?, ?)", rows)
        return len(rows)

    def probes(self):
        """Faithfulness probe results (see evalkit.probes); empty when none were run."""
        import pandas as pd

        exists = self.con.execute("SELECT 1 FROM sqlite_master WHERE type='table' AND name='probes'").fetchone()
        if not exists:
            return pd.DataFrame()
        return pd.read_sql_query("SELECT * FROM probes", self.con)

    def verdicts(self):
        import pandas as pd

        df = pd.read_sql_query("SELECT * FROM verdicts", self.con)
        df["detail"] = df["detail"].map(json.loads)
        return df


def cache_key(model_sha: str, dtype: str, prompt: str, max_new_tokens: int, stop: list[str],
              mode: str = "greedy") -> str:
    """Everything that determines a greedy completion, hashed."""
    blob = json.dumps(
        {"model": model_sha, "dtype": dtype, "prompt": prompt, "max_new_tokens": max_new_tokens,
         "stop": list(stop), "mode": mode},
        sort_keys=True,
    )
    return hashlib.sha256(blob.encode("utf-8")).hexdigest()


_CACHE_SCHEMA = """
CREATE TABLE IF NOT EXISTS generations (
    key TEXT PRIMARY KEY,
    completion TEXT NOT NULL,
    prompt_tokens INTEGER NOT NULL,
    new_tokens INTEGER NOT NULL,
    min_margin REAL,
    finish TEXT NOT NULL,
    seconds REAL NOT NULL,
    extra TEXT NOT NULL DEFAULT '{}',
    created REAL NOT NULL
);
"""


class GenerationCache:
    """Completions already computed, shared across runs."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.con = _connect(self.path)
        with self.con:
            self.con.executescript(_CACHE_SCHEMA)

    def get(self, key: str) -> dict | None:
        row = self.con.execute(
            "SELECT completion, prompt_tokens, new_tokens, min_margin, finish, seconds, extra "
            "FROM generations WHERE key = ?",
            (key,),
        ).fetchone()
        if row is None:
            return None
        names = ("completion", "prompt_tokens", "new_tokens", "min_margin", "finish", "seconds", "extra")
        out = dict(zip(names, row))
        out["extra"] = json.loads(out["extra"])
        return out

    def put(self, key: str, completion: str, prompt_tokens: int, new_tokens: int,
            min_margin: float | None, finish: str, seconds: float, extra: dict | None = None) -> None:
        with self.con:
            self.con.execute(
                "INSERT OR REPLACE INTO generations VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (key, completion, prompt_tokens, new_tokens, min_margin, finish, seconds,
                 json.dumps(extra or {}, sort_keys=True), time.time()),
            )

    def close(self) -> None:
        self.con.close()

    def __len__(self) -> int:
        with closing(self.con.cursor()) as cur:
            return cur.execute("SELECT COUNT(*) FROM generations").fetchone()[0]
