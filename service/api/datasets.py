"""Dataset endpoints: register and seal (steward), read metadata, download the development partition.

Dataset documents are shaped for the caller's role (``records.datasets.public_view``): the balance
table of the seal reaches stewards only. Another team's dataset stays a 404 (``auth.team_dataset``).

Registration takes a multipart upload or, as JSON, a path under the configured import root. The
key, its role and a declared Content-Length are checked before a byte of the body is read; the file
part then streams into a spool file under the data dir (``service.vault.spool``), never memory, and
is removed afterwards whatever happens; ``service.vault.registration`` removes its own partial files.
"""

from __future__ import annotations

from pathlib import Path, PurePosixPath
from typing import IO, Any

from flask import Response, request, stream_with_context
from flask.views import MethodView
from marshmallow import ValidationError
from werkzeug.datastructures import FileStorage, MultiDict

from service.api import SealfoldBlueprint, json_response, service_context
from service.api.auth import current_key, team_dataset
from service.api.bodies import request_json
from service.api.dataset_schemas import (
    DatasetDeclarationSchema,
    DatasetImportSchema,
    DatasetListSchema,
    DatasetSchema,
    DatasetUploadSchema,
)
from service.errors import InputError, PayloadTooLarge, UnsupportedFormat, field_error
from service.records import datasets
from service.settings import Settings
from service.vault.registration import DatasetDeclaration, register_dataset
from service.vault.spool import UploadSpool
from service.vault.store import iter_development_csv

blp = SealfoldBlueprint("datasets", __name__, url_prefix="/v1/datasets",
                        description="Register, seal and read datasets.")

_BY_SUFFIX = {".csv": "csv", ".parquet": "parquet", ".pq": "parquet"}
_BY_MIMETYPE = {
    "text/csv": "csv", "application/csv": "csv",
    "application/vnd.apache.parquet": "parquet", "application/x-parquet": "parquet",
}
_REGISTER_BODY = {
    "required": True,
    "content": {
        "multipart/form-data": {"schema": DatasetUploadSchema},
        "application/json": {"schema": DatasetImportSchema},
    },
}


def detect_format(filename: str, mimetype: str) -> str:
    """Return "csv" or "parquet" from the file name, else from the content type; 415 otherwise."""
    fmt = _BY_SUFFIX.get(PurePosixPath(filename).suffix.lower()) or _BY_MIMETYPE.get(mimetype.lower())
    if fmt is None:
        raise UnsupportedFormat(
            f"the file must be CSV (.csv or text/csv) or Parquet (.parquet or application/vnd.apache.parquet), "
            f"got file name {filename!r} with content type {mimetype or 'none'!r}"
        )
    return fmt


def import_path(settings: Settings, raw: str) -> Path:
    """Resolve a client-given path inside the import root; anything escaping it is refused."""
    root = settings.import_root
    if root is None:
        raise field_error(InputError, "/path", "importing by path is disabled on this server; upload the "
                          "file as multipart/form-data instead")
    if "\x00" in raw:
        raise field_error(InputError, "/path", "path must not contain a NUL character (no file name has one); "
                          "give a file name relative to the import root")
    relative = PurePosixPath(raw)
    try:
        candidate = (root / relative).resolve()
        inside = candidate.is_relative_to(root.resolve())
        found = inside and candidate.is_file()
    except OSError as exc:  # a name the file system refuses, such as one too long
        raise field_error(InputError, "/path", f"path is not a usable file name under the import root "
                          f"({exc.strerror or type(exc).__name__}), got {raw!r}") from None
    if relative.is_absolute() or ".." in relative.parts or not inside:
        raise field_error(InputError, "/path", f"path must be relative to the import root and stay inside "
                          f"it, got {raw!r}")
    if not found:
        raise field_error(InputError, "/path", f"no file {raw!r} under the import root")
    return candidate


def _declaration(loaded: dict[str, Any]) -> DatasetDeclaration:
    fields = {k: v for k, v in loaded.items() if k not in ("file", "path")}
    return DatasetDeclaration(**fields)


def _register_upload(settings: Settings) -> dict[str, Any]:
    caller = current_key()
    refuse_declared_oversize(settings.max_upload_bytes)
    with UploadSpool(settings) as spool:
        form, files = _receive_multipart(spool)
        messages: dict[str, Any] = {}
        try:
            loaded = DatasetDeclarationSchema().load(form.to_dict())
        except ValidationError as exc:
            messages.update(exc.messages_dict)
        upload: FileStorage | None = files.get("file")
        if upload is None or not upload.filename:
            messages["file"] = ["send the dataset as the multipart file field 'file'"]
        if messages:
            raise ValidationError(messages)
        assert upload is not None
        fmt = detect_format(upload.filename or "", upload.mimetype or "")
        upload.stream.flush()
        return register_dataset(settings, service_context().engine, caller, spool.path_of(upload.stream), fmt,
                                _declaration(loaded))


def refuse_declared_oversize(limit: int) -> None:
    """Answer 413 for a declared Content-Length over ``limit`` before a byte of the body is read."""
    declared = request.content_length
    if declared is not None and declared > limit:
        raise PayloadTooLarge(f"the request body of {declared} bytes exceeds the limit of {limit} bytes; "
                              f"send a smaller file")


def _receive_multipart(spool: UploadSpool) -> tuple[MultiDict[str, str], MultiDict[str, FileStorage]]:
    """Parse the multipart body, writing each file part straight into a spool file.

    ``request.stream`` stops at the app's MAX_CONTENT_LENGTH, a body without a declared length
    (chunked) included, with a 413.
    """

    def spool_file(total_content_length: int | None, content_type: str | None, filename: str | None,
                   content_length: int | None = None) -> IO[bytes]:
        return spool.new_file()

    parser = request.form_data_parser_class(
        stream_factory=spool_file, max_form_memory_size=request.max_form_memory_size,
        max_content_length=request.max_content_length, max_form_parts=request.max_form_parts,
        cls=request.parameter_storage_class,
    )
    _, form, files = parser.parse(request.stream, request.mimetype, request.content_length, request.mimetype_params)
    return form, files


def _register_import(settings: Settings) -> dict[str, Any]:
    caller = current_key()
    loaded = DatasetImportSchema().load(request_json(request))
    source = import_path(settings, loaded["path"])
    fmt = detect_format(source.name, "")
    return register_dataset(settings, service_context().engine, caller, source, fmt, _declaration(loaded))


@blp.route("")
class DatasetCollection(MethodView):
    @blp.requires("steward")
    @blp.doc(requestBody=_REGISTER_BODY)
    @blp.response(201, DatasetSchema, headers={"Location": {"schema": {"type": "string"}}})
    @blp.problem(409, "The team already has a dataset of this name (names are unique within a team)")
    @blp.problem(413, "The upload exceeds the server's size limit")
    @blp.problem(415, "Neither CSV nor Parquet, or neither multipart nor JSON")
    @blp.problem(422, "The dataset or its declaration is rejected")
    def post(self) -> Response:
        """Register a dataset and seal its holdout (steward)."""
        settings = service_context().settings
        if request.mimetype == "multipart/form-data":
            record = _register_upload(settings)
        elif request.is_json:
            record = _register_import(settings)
        else:
            raise UnsupportedFormat(f"send multipart/form-data with a file, or application/json with a path; "
                                    f"got {request.mimetype or 'no content type'}")
        return json_response(record, 201, {"Location": f"/v1/datasets/{record['id']}"})

    @blp.requires("submitter")
    @blp.response(200, DatasetListSchema)
    def get(self) -> Response:
        """List the team's datasets, newest first."""
        caller = current_key()
        listed = datasets.list_for_team(service_context().engine, caller.team, role=caller.role)
        return json_response({"datasets": listed})


@blp.route("/<ds_id>")
class DatasetItem(MethodView):
    @blp.requires("submitter")
    @blp.response(200, DatasetSchema)
    @blp.problem(404, "No such dataset in the caller's team")
    def get(self, ds_id: str) -> Response:
        """Read one dataset's metadata: columns, rows per partition, fold plan, fingerprints, balance.

        The balance of the seal is a summary for submitters and the per-column table for stewards.
        """
        return json_response(team_dataset(current_key(), ds_id))


@blp.route("/<ds_id>/development")
class DevelopmentPartition(MethodView):
    @blp.requires("submitter")
    @blp.problem(404, "No such dataset in the caller's team")
    @blp.doc(responses={"200": {"description": "The development rows as CSV, row_id first",
                                "content": {"text/csv": {"schema": {"type": "string"}}}}})
    def get(self, ds_id: str) -> Response:
        """Download the development partition as CSV, with its stable row_id column first."""
        record = team_dataset(current_key(), ds_id)
        chunks = iter_development_csv(service_context().settings, record["id"])
        # Read the first chunk now, so a missing or broken partition is a problem response and not a
        # truncated 200.
        first = next(chunks, "")

        def body() -> Any:
            yield first
            yield from chunks

        response = Response(stream_with_context(body()), mimetype="text/csv")
        response.headers["Content-Disposition"] = f'attachment; filename="{record["id"]}-development.csv"'
        return response
