"""Requests read from files and results written to files (the command's compute)."""

import json
from pathlib import Path

from service.encode import RunResult
from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.errors import (
    UnknownDatasetError,
)
from service.pipeline.seasons import run
from service.schemas import IndicatorRequest, validate_request
from service.settings import Settings
from service.store import open_store


def load_request(
    request_path: Path, features_path: Path | None, events_path: Path | None = None
) -> IndicatorRequest:
    """The request of a JSON file, its features replaced by a GeoJSON file's and its events by a CSV or
    Parquet file's (columns id, feature_id, date; service.client.events_list) when given."""
    from service.client import events_list
    from service.errors import RequestError

    try:
        data = json.loads(request_path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise RequestError(f"cannot read the request {str(request_path)!r}: {exc}", field="request") from None
    if not isinstance(data, dict):
        raise RequestError(f"the request {str(request_path)!r} is not a JSON object", field="request")
    if features_path is not None:
        try:
            data["features"] = json.loads(features_path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as exc:
            raise RequestError(
                f"cannot read the features {str(features_path)!r}: {exc}", field="features"
            ) from None
    if events_path is not None:
        data["events"] = events_list(events_path)
    return validate_request(IndicatorRequest, data)


def compute_to_file(
    *,
    store_location: str | list[str],
    request_path: Path,
    features_path: Path | None,
    out_path: Path,
    settings: Settings,
    progress: bool = True,
    events_path: Path | None = None,
) -> RunResult:
    """`wxshock compute`: the whole chain locally, written to a .parquet, .csv or .json file.

    With several stores the first is the request's dataset and every one is served by its name (the
    directory stem) to variants that name it.
    """
    from service.encode import encode, format_from_suffix
    from service.registry import dataset_name

    fmt = format_from_suffix(out_path.suffix)
    request = load_request(request_path, features_path, events_path)
    locations = [store_location] if isinstance(store_location, str) else list(store_location)
    stores = {
        dataset_name(location): open_store(
            location, name=dataset_name(location), storage_options=settings.storage_options()
        )
        for location in locations
    }
    store_location = locations[0]
    store = stores[dataset_name(store_location)]
    if request.dataset is not None and request.dataset != store.name:
        raise UnknownDatasetError(
            f"the request names dataset {request.dataset!r} but the store {store_location!r} is dataset "
            f"{store.name!r}; drop 'dataset' or name the right store",
            field="dataset",
        )
    bar = _progress_bar(progress)
    try:
        result = run(request, store, settings, progress=bar.update if bar else None, stores=stores)
    finally:
        if bar:
            bar.close()
    body, _, _ = encode(result, fmt)
    write_atomically(out_path, body)
    if fmt == "csv":
        # CSV has no metadata; keep the provenance beside it.
        sidecar = out_path.with_name(out_path.name + ".provenance.json")
        write_atomically(
            sidecar,
            json.dumps({"provenance": result.provenance, "warnings": result.warnings}, indent=2).encode(
                "utf-8"
            ),
        )
    return result


class _Bar:
    """A tqdm bar fed with (done, total) feature counts."""

    def __init__(self) -> None:
        from tqdm import tqdm

        self._bar = tqdm(total=0, unit="feature", desc="wxshock", leave=True)

    def update(self, done: int, total: int) -> None:
        """Move the bar to ``done`` of ``total`` features."""
        self._bar.total = total
        self._bar.n = done
        self._bar.refresh()

    def close(self) -> None:
        """Finish the bar."""
        self._bar.close()


def _progress_bar(enabled: bool) -> _Bar | None:
    """A progress bar when asked for and the output is a terminal-like stream."""
    return _Bar() if enabled else None
