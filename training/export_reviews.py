"""`knowngood export-reviews`: the operator-reviewed inspections of one part type, downloaded from a running service
into the holdout layout `train` and `tune` read: `good/` and `defective/<class>/` (`holdout.defect_class`), plus
`reviews.csv` listing every exported file.

Talks to the service's documented REST API with the standard library only (`urllib.request`), so `training` needs
neither the service nor another HTTP package. Exit codes as every command: 0 done, 2 bad input or a refusal.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import hashlib
import http.client
import os
import re
import sys
import tempfile
import urllib.error
import urllib.parse
import urllib.request
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

from knowngood.training.errors import KnowngoodError
from knowngood.training.service_client import TOKEN_ENV, Client, ServiceError, read_token

PAGE = 1000  # the list route's largest page
CSV_NAME = "reviews.csv"
CSV_FIELDS = ("id", "time", "label", "defect_class", "operator", "verdict", "score", "threshold", "model_id", "file")
UNCLASSIFIED = "unclassified"  # the folder of defective reviews without a defect class
_ID = re.compile(r"[0-9a-f]{32}")
_SHA256 = re.compile(r"[0-9a-f]{64}")
# What `train` reads (data.IMAGE_SUFFIXES), told by the first bytes: the service keeps the upload as it came, name-less
_MAGIC = {b"\x89PNG\r\n\x1a\n": "png", b"\xff\xd8\xff": "jpg", b"BM": "bmp", b"II*\x00": "tif", b"MM\x00*": "tif"}
_SUFFIXES = {f".{ext}" for ext in _MAGIC.values()}


@dataclass(frozen=True)
class Reviewed:
    """One reviewed inspection, as far as the export needs it."""

    id: str
    time: str
    label: str  # good | defective: the latest review
    defect_class: str | None
    operator: str
    verdict: str
    score: float
    threshold: float
    model_id: str
    sha256: str  # of the image as uploaded
    image_kept: bool

    @property
    def folder(self) -> str:
        return "good" if self.label == "good" else f"defective/{class_folder(self.defect_class)}"

    def csv_row(self, file: str) -> dict:
        values = (self.id, self.time, self.label, self.defect_class or "", self.operator, self.verdict)
        return dict(zip(CSV_FIELDS, (*values, repr(self.score), repr(self.threshold), self.model_id, file)))


def class_folder(defect_class: str | None) -> str:
    """A defect class as one folder name that stays inside `defective/`: characters other than letters, digits,
    `.`, `-`, `_` and spaces become `_`; no leading dots. Classes that differ only in those characters share it. A
    class named good becomes good_ (`tune` refuses a defect class named good: good parts among the defective)."""
    name = re.sub(r"[^\w.\- ]", "_", (defect_class or "").strip()).strip(". ")[:100]
    return f"{name}_" if name.lower() == "good" else name or UNCLASSIFIED


def parse_item(item: dict, part_type: str) -> Reviewed:
    """An item of `GET /v1/inspections`; anything outside the contract is a ServiceError naming the inspection."""
    ident = item.get("id") if isinstance(item, dict) else None
    if isinstance(item, dict) and item.get("review") is None:
        raise ServiceError(f"inspection {ident}: listed as reviewed but has no review")
    try:
        review = item["review"]
        label, image = review["label"], item["image"]
        out = Reviewed(
            id=ident,
            time=str(item["time"]),
            label=label,
            defect_class=review.get("defect_class") or None,
            operator=str(review.get("operator") or ""),
            verdict=str(item["verdict"]),
            score=float(item["score"]),
            threshold=float(item["threshold"]),
            model_id=str((item.get("model") or {}).get("id") or ""),
            sha256=str(image["sha256"]).lower(),
            image_kept=bool(item.get("image_kept", True)),
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise ServiceError(f"inspection {ident}: the service's answer lacks or garbles a field ({exc})") from None
    if not isinstance(ident, str) or not _ID.fullmatch(ident) or not _SHA256.fullmatch(out.sha256):
        raise ServiceError(f"inspection {ident!r}: unexpected id or image sha256 from the service")
    if label not in ("good", "defective"):
        raise ServiceError(f"inspection {ident}: unexpected review label {label!r}")
    if item.get("part_type") != part_type:  # a service that ignores the filter would mix part types into one holdout
        raise ServiceError(
            f"inspection {ident} is of part type {item.get('part_type')!r}, not {part_type!r}: the service does not "
            "filter by part type (an older version?)"
        )
    return out


def reviewed_inspections(client: Client, *, part_type: str, since: str | None, until: str | None) -> list[dict]:
    """Every reviewed inspection of the part type in [since, until), newest first, one page after another.
    Rows inserted meanwhile push rows onto the next page: an id already seen is dropped."""
    query = {"part_type": part_type, "reviewed": "true", "limit": PAGE}
    query.update({k: v for k, v in (("since", since), ("until", until)) if v})
    seen: dict[str, dict] = {}
    offset = 0
    while True:
        page = client.get_json("/v1/inspections", {**query, "offset": offset})
        items, total = (page.get("items"), page.get("total")) if isinstance(page, dict) else (None, None)
        if not isinstance(items, list) or not isinstance(total, int):
            raise ServiceError("GET /v1/inspections: the answer has no items list and total count")
        for item in items:
            seen.setdefault(item.get("id") if isinstance(item, dict) else None, item)
        offset += len(items)
        if not items or offset >= total:
            return list(seen.values())


@dataclass
class Summary:
    written: Counter = field(default_factory=Counter)  # folder ("good", "defective/<class>") -> images written
    present: int = 0  # already there with the same content
    moved: int = 0  # earlier exports of an inspection whose review changed, removed from the old folder
    not_kept: list[str] = field(default_factory=list)  # ids whose image the service did not keep
    unreadable: list[str] = field(default_factory=list)  # ids of images in a format train does not read
    mismatched: list[str] = field(default_factory=list)  # ids whose download did not match the recorded sha256
    rows: int = 0  # in reviews.csv


def export_reviews(
    client: Client, out: Path, *, part_type: str, since: str | None = None, until: str | None = None
) -> Summary:
    """Downloads the reviewed images into `out`/good and `out`/defective/<class> as `<id>.<ext>` (atomically) and
    writes `out`/reviews.csv. A file already there with the recorded content is not downloaded again, so a later
    export into the same folder adds only what is new; an inspection whose review changed moves folder."""
    if out.exists() and not out.is_dir():
        raise KnowngoodError(f"--out {out}: not a folder")
    items = [
        parse_item(i, part_type) for i in reviewed_inspections(client, part_type=part_type, since=since, until=until)
    ]
    out.mkdir(parents=True, exist_ok=True)
    existing = _existing_files(out)
    summary, rows = Summary(), {}
    try:
        for item in items:
            path = _export_one(client, out, item, existing, summary)
            if path is not None:
                rows[item.id] = item.csv_row(path.relative_to(out).as_posix())
    finally:  # also after an error: the csv then lists what is in the folders so far
        summary.rows = _write_csv(out, rows, existing)
    return summary


def _existing_files(out: Path) -> dict[str, list[Path]]:
    """id -> the files an earlier export left under good/ and defective/."""
    found: dict[str, list[Path]] = {}
    for base in (out / "good", out / "defective"):
        for path in sorted(base.rglob("*")) if base.is_dir() else []:
            if path.suffix in _SUFFIXES and _ID.fullmatch(path.stem) and path.is_file():
                found.setdefault(path.stem, []).append(path)
    return found


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as f:
        while chunk := f.read(1 << 20):
            h.update(chunk)
    return h.hexdigest()


def _export_one(client: Client, out: Path, item: Reviewed, existing: dict, summary: Summary) -> Path | None:
    """The item's file in its folder (downloaded unless already there), or None when it could not be written."""
    if not item.image_kept:
        summary.not_kept.append(item.id)
        return None
    earlier = existing.get(item.id, [])
    folder = out / item.folder
    path = next((p for p in earlier if p.parent == folder and _sha256(p) == item.sha256), None)
    if path is not None:
        summary.present += 1
    else:
        path = _download(client, out, item, summary)
        if path is None:
            return None
        summary.written[item.folder] += 1
    for old in earlier:
        if old != path:
            old.unlink(missing_ok=True)
            summary.moved += 1
    existing[item.id] = [path]
    return path


def _download(client: Client, out: Path, item: Reviewed, summary: Summary) -> Path | None:
    """Streams the original into a temporary file, checks its sha256 and renames it into place."""
    try:
        response = client.open(f"/v1/inspections/{item.id}/original")
    except ServiceError as exc:
        if exc.status != 404:
            raise
        summary.not_kept.append(item.id)  # kept once, since removed by the service's retention
        return None
    fd, tmp_name = tempfile.mkstemp(dir=out, prefix=".export-", suffix=".part")
    tmp, h, head = Path(tmp_name), hashlib.sha256(), b""
    try:
        try:
            with response, os.fdopen(fd, "wb") as f:
                while chunk := response.read(1 << 20):
                    head = head or chunk[:16]
                    h.update(chunk)
                    f.write(chunk)
        except (OSError, http.client.HTTPException) as exc:  # broke off, or the disk is full
            raise ServiceError(
                f"inspection {item.id}: the image could not be downloaded into {out} ({exc!r})"
            ) from None
        ext = next((e for magic, e in _MAGIC.items() if head.startswith(magic)), None)
        if h.hexdigest() != item.sha256:
            summary.mismatched.append(item.id)
        elif ext is None:
            summary.unreadable.append(item.id)
        else:
            path = out / item.folder / f"{item.id}.{ext}"
            path.parent.mkdir(parents=True, exist_ok=True)
            os.replace(tmp, path)
            return path
        return None
    finally:
        tmp.unlink(missing_ok=True)


def _write_csv(out: Path, rows: dict[str, dict], existing: dict[str, list[Path]]) -> int:
    """reviews.csv: this export's rows, plus the earlier rows whose file is still in place; newest first."""
    old = out / CSV_NAME
    if old.is_file():
        with old.open(newline="", encoding="utf-8") as f:
            for row in csv.DictReader(f):
                ident, file = row.get("id"), row.get("file")
                if ident not in rows and file and out / file in existing.get(ident, []):
                    rows[ident] = {k: row.get(k, "") for k in CSV_FIELDS}
    ordered = sorted(rows.values(), key=lambda r: (r["time"], r["id"]), reverse=True)
    fd, tmp_name = tempfile.mkstemp(dir=out, prefix=".export-", suffix=".part")
    try:
        with os.fdopen(fd, "w", newline="", encoding="utf-8") as f:
            writer = csv.DictWriter(f, fieldnames=CSV_FIELDS)
            writer.writeheader()
            writer.writerows(ordered)
        os.replace(tmp_name, old)
    finally:
        Path(tmp_name).unlink(missing_ok=True)
    return len(ordered)


def parse_time(option: str, text: str | None) -> dt.datetime | None:
    """An ISO 8601 time, in UTC; without an offset it is UTC, as the service reads it."""
    if text is None:
        return None
    try:
        t = dt.datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
        return (t if t.tzinfo else t.replace(tzinfo=dt.timezone.utc)).astimezone(dt.timezone.utc)
    except (ValueError, OverflowError):
        raise KnowngoodError(
            f"{option} {text!r}: not an ISO 8601 time (e.g. 2024-05-01 or 2024-05-01T06:00+02:00)"
        ) from None


def register(sub) -> None:
    p = sub.add_parser(
        "export-reviews",
        help="download operator-reviewed images from a service into good/ and defective/<class>/",
        description=f"The bearer token comes from {TOKEN_ENV} or --token-file, never from the command line.",
    )
    p.add_argument("--url", required=True, help="the service's address, e.g. http://inspection-pc:8000")
    p.add_argument("--part-type", required=True, metavar="NAME")
    p.add_argument("--since", default=None, metavar="T", help="inspected at or after T (ISO 8601; UTC without offset)")
    p.add_argument("--until", default=None, metavar="T", help="inspected before T (ISO 8601; UTC without offset)")
    p.add_argument("--out", type=Path, required=True, metavar="DIR")
    p.add_argument("--token-file", type=Path, default=None, metavar="FILE", help="the token is its first line")
    p.add_argument("--timeout", type=float, default=60.0, metavar="S", help="seconds per request (default 60)")
    p.set_defaults(func=cmd_export_reviews)


def cmd_export_reviews(args: argparse.Namespace) -> int:
    since, until = parse_time("--since", args.since), parse_time("--until", args.until)
    if since and until and until <= since:
        raise KnowngoodError(f"--until {args.until} must be after --since {args.since}")
    since_text, until_text = (t.isoformat() if t else None for t in (since, until))
    if urllib.parse.urlsplit(args.url).scheme not in ("http", "https") or not urllib.parse.urlsplit(args.url).netloc:
        raise KnowngoodError(f"--url {args.url!r}: give the service's address, e.g. http://inspection-pc:8000")
    # The command line is the edge where settings come in: the token is read here and passed on as a value.
    client = Client(args.url, read_token(args.token_file, os.environ.get(TOKEN_ENV)), timeout=args.timeout)
    summary = export_reviews(client, args.out, part_type=args.part_type, since=since_text, until=until_text)
    print_summary(summary, args.out, args.part_type)
    if summary.mismatched:
        raise ServiceError(
            f"{len(summary.mismatched)} downloaded image(s) did not match their recorded sha256 and were not "
            f"written: {', '.join(summary.mismatched)}"
        )
    return 0


def print_summary(s: Summary, out: Path, part_type: str) -> None:
    good = s.written["good"]
    classes = sorted((k.removeprefix("defective/"), n) for k, n in s.written.items() if k != "good")
    per_class = ", ".join(f"{name} {n}" for name, n in classes)
    defective = f"{sum(n for _, n in classes)} defective" + (f" ({per_class})" if per_class else "")
    print(f"{part_type}: wrote {good} good, {defective} into {out}; {s.present} already there")
    if s.moved:
        print(f"moved {s.moved} image(s) whose review changed since an earlier export")
    if s.not_kept:
        print(
            f"skipped {len(s.not_kept)} reviewed inspection(s) with no kept image "
            "(which images the service keeps: KNOWNGOOD_KEEP_IMAGES, within its retention)"
        )
    if s.unreadable:
        print(
            f"note: skipped {len(s.unreadable)} image(s) in a format train does not read (not PNG, JPEG, BMP, TIFF): "
            f"{', '.join(s.unreadable)}",
            file=sys.stderr,
        )
    print(f"{out / CSV_NAME}: {s.rows} exported image(s) listed")
