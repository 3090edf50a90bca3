"""Writing a cached result out with its provenance embedded, plus a PROV-JSON sidecar.

FITS gets ORIGIN/DATE/HISTORY cards (FITS 4.0 §4.4.2) and checksums; VOTable gets INFO
elements (the names in use by TAP services: QUERY, request_date, ...); Parquet keeps the
provenance JSON in its schema metadata; CSV has nowhere to put it, so only the sidecar speaks.
"""

from __future__ import annotations

import json
from pathlib import Path

from jobdesk import provenance as prov_mod

FORMATS = {".fits": "fits", ".fit": "fits", ".vot": "votable", ".xml": "votable",
           ".votable": "votable", ".parquet": "parquet", ".csv": "csv", ".ecsv": "ascii.ecsv"}


def export(table, prov: dict, path: Path | str) -> list[Path]:
    """Write ``table`` to ``path`` (format from the suffix) and ``<path>.prov.json``."""
    path = Path(path)
    fmt = FORMATS.get(path.suffix.lower())
    if fmt is None:
        raise ValueError(f"cannot tell the format of {path.name}; use one of "
                         + ", ".join(sorted(FORMATS)))
    table = table.copy(copy_data=False)
    table.meta = {}  # the provenance below replaces the loader's own metadata
    if fmt == "fits":
        from astropy.io import fits
        hdu = fits.table_to_hdu(table)
        for keyword, value, comment in prov_mod.fits_cards(prov):
            if keyword == "HISTORY":
                hdu.header.add_history(value)
            else:
                hdu.header[keyword] = (value, comment)
        fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path, overwrite=True, checksum=True)
    elif fmt == "votable":
        from astropy.io.votable import from_table
        from astropy.io.votable.tree import Info
        vot = from_table(table)
        resource = vot.resources[0]
        for name, value in (("QUERY", " ".join((prov.get("adql") or "").split())),
                            ("service", prov["service"]), ("job_url", prov.get("job_url") or ""),
                            ("request_date", prov.get("finished") or ""),
                            ("QUERY_STATUS", "OVERFLOW" if prov.get("truncated") else "OK"),
                            ("jobdesk_key", prov["key"]),
                            ("result_sha256", prov.get("result_sha256") or "")):
            resource.infos.append(Info(name=name, value=value))
        vot.to_xml(str(path))
    elif fmt == "parquet":
        import pyarrow as pa
        import pyarrow.parquet as pq
        arrow = pa.Table.from_pandas(table.to_pandas(), preserve_index=False)
        meta = dict(arrow.schema.metadata or {})
        meta[b"jobdesk.provenance"] = json.dumps(prov).encode()
        pq.write_table(arrow.replace_schema_metadata(meta), path)
    else:
        table.write(path, format=fmt, overwrite=True)
    sidecar = path.with_name(path.name + ".prov.json")
    sidecar.write_text(json.dumps(prov_mod.to_prov_json(prov), indent=1))
    return [path, sidecar]
