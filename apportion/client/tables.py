"""Tabular answers (lists of rows) that turn into a pandas DataFrame in a notebook.

pandas is optional (the `notebook` extra): the client works without it, and `to_pandas()` says
how to install it when it is missing."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from pydantic import BaseModel

if TYPE_CHECKING:
    import pandas


def _plain(row: Any) -> Any:
    return row.model_dump(mode="json") if isinstance(row, BaseModel) else row


class Rows(list[Any]):
    """A list of rows (dicts, or answer models) as the server sent them, in its order."""

    def to_pandas(self) -> pandas.DataFrame:
        """One DataFrame row per answer row; nested values (dicts, lists) stay objects."""
        try:
            import pandas as pd
        except ImportError as exc:  # pragma: no cover - depends on the installation
            raise ImportError(
                "to_pandas() needs pandas: pip install 'apportion[notebook]'"
            ) from exc
        return pd.DataFrame.from_records([_plain(r) for r in self])
