"""The datasets this server serves, addressed by name only."""

from __future__ import annotations

from fastapi import APIRouter, Depends

from service.routes.deps import Registry, require_token
from service.routes.models import Dataset, DatasetList, problem_responses

router = APIRouter(prefix="/v1/datasets", tags=["datasets"], dependencies=[Depends(require_token)])


@router.get(
    "", operation_id="listDatasets", response_model=DatasetList, responses=problem_responses(401, 503)
)
def list_datasets(registry: Registry) -> DatasetList:
    """Every dataset served, the default first: variables, units, grid, years, calendar, layers, fingerprint."""
    return DatasetList(datasets=[Dataset(**registry.describe(name)) for name in registry])


@router.get(
    "/{name}",
    operation_id="getDataset",
    response_model=Dataset,
    responses=problem_responses(401, 404, 422, 503),
)
def get_dataset(name: str, registry: Registry) -> Dataset:
    """One dataset: variables and units, CRS, resolution, bounds, years, calendar, weight layers, fingerprint."""
    registry.get_dataset(name)
    return Dataset(**registry.describe(name))
