"""Collections: create or update, list, show, remove."""

from __future__ import annotations

from fastapi import APIRouter, Response

from service.api.deps import CallerDep, RuntimeDep
from service.api.errors import ERROR_RESPONSES
from service.api.routing import StrictJsonRoute
from service.api.schemas import CollectionIn, CollectionListOut, CollectionOut
from service.usecases import collections as usecase

router = APIRouter(
    prefix="/v1/collections",
    tags=["collections"],
    responses=ERROR_RESPONSES,
    route_class=StrictJsonRoute,
)


@router.put("/{name}", response_model=CollectionOut, responses={201: {"model": CollectionOut}})
def put_collection(
    name: str, body: CollectionIn, response: Response, runtime: RuntimeDep, caller: CallerDep
) -> dict[str, object]:
    spec = usecase.CollectionSpec(
        description=body.description,
        attributes=(
            None
            if body.attributes is None
            else {k: v.model_dump(exclude_none=True) for k, v in body.attributes.items()}
        ),
        remove_attributes=body.remove_attributes,
        chunking=None if body.chunking is None else body.chunking.model_dump(),
        cite_attributes=body.cite_attributes,
        answer_caution=body.answer_caution,
        retrieval=None if body.retrieval is None else body.retrieval.model_dump(exclude_none=True),
        vectors=None if body.vectors is None else body.vectors.model_dump(exclude_none=True),
    )
    created, view = usecase.put_collection(runtime, caller, name, spec)
    response.status_code = 201 if created else 200
    return view


@router.get("", response_model=CollectionListOut)
def list_collections(runtime: RuntimeDep, caller: CallerDep) -> dict[str, object]:
    return {"collections": usecase.list_collections(runtime, caller)}


@router.get("/{name}", response_model=CollectionOut)
def get_collection(name: str, runtime: RuntimeDep, caller: CallerDep) -> dict[str, object]:
    return usecase.get_collection(runtime, caller, name)


@router.delete("/{name}", status_code=204, response_class=Response)
def delete_collection(name: str, runtime: RuntimeDep, caller: CallerDep) -> Response:
    usecase.delete_collection(runtime, caller, name)
    return Response(status_code=204)
