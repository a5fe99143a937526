"""Tabular answers (lists of rows) that turn into a pandas DataFrame in a notebook.

pandas is optional (the `notebook` extra): the client works without it, and `to_pandas()` says
how to install it when it is missing."""

from __future__ import annotations

import importlib
from typing import Any

from pydantic import BaseModel


def as_json(answer: Any) -> Any:
    """An answer as JSON-ready data, the fields the server sent: a model dumped (fields it left
    out stay out), rows and lists item by item, anything else as it is."""
    if isinstance(answer, BaseModel):
        return answer.model_dump(mode="json", exclude_unset=True)
    if isinstance(answer, list | tuple):
        return [as_json(a) for a in answer]
    if isinstance(answer, dict):
        return {k: as_json(v) for k, v in answer.items()}
    return answer


class Rows(list[Any]):
    """A list of rows (answer models, or dicts) as the server sent them, in its order."""

    def to_pandas(self) -> Any:
        """A pandas DataFrame: one row per answer row; nested values (dicts, lists) stay
        objects."""
        try:
            pd = importlib.import_module("pandas")  # optional: the `notebook` extra
        except ImportError as exc:  # pragma: no cover - depends on the installation
            raise ImportError(
                "to_pandas() needs pandas: pip install 'apportion[notebook]'"
            ) from exc
        return pd.DataFrame.from_records([as_json(r) for r in self])
