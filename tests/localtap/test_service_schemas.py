"""The embedded service's documents checked against the IVOA XML schemas saved in schemas/.

UWS 1.1, VOSI 1.1 (tables, capabilities), VODataService 1.2, TAPRegExt 1.0 and VOTable 1.4:
see schemas/README.md for where each file comes from. Table and column names are read from
the service itself, so the tests do not depend on the demo catalogue's names.
"""

from __future__ import annotations

import time
import warnings
from pathlib import Path
from urllib.parse import quote

import pytest
from lxml import etree

SCHEMAS = Path(__file__).parent / "schemas"
NS = {"vosi": "http://www.ivoa.net/xml/VOSITables/v1.0",
      "vs": "http://www.ivoa.net/xml/VODataService/v1.1",
      "uws": "http://www.ivoa.net/xml/UWS/v1.0",
      "v": "http://www.ivoa.net/xml/VOTable/v1.3"}
# Where the schemas import each other from (their schemaLocation URLs) -> the saved file.
LOCAL = [("xlink", "xlink.xsd"), ("VOResource", "VOResource-v1.2.xsd"),
         ("VODataService", "VODataService-v1.2.xsd"), ("stc", "stc-v1.30.xsd"),
         ("TAPRegExt", "TAPRegExt-v1.0.xsd"), ("VOSICapabilities", "VOSICapabilities-v1.0.xsd"),
         ("VOSITables", "VOSITables-v1.1.xsd"), ("UWS", "UWS-1.1.xsd")]


class _Saved(etree.Resolver):
    def resolve(self, url, pubid, context):
        for word, name in LOCAL:
            if word.lower() in url.lower():
                return self.resolve_filename(str(SCHEMAS / name), context)
        raise AssertionError(f"schema {url} is not saved in {SCHEMAS}")  # never the network


def _schema(*files: str) -> etree.XMLSchema:
    """One schema holding the given files' namespaces (a driver importing each)."""
    imports = "".join(
        f'<xs:import namespace="{etree.parse(str(SCHEMAS / f)).getroot().get("targetNamespace")}"'
        f' schemaLocation="{(SCHEMAS / f).as_uri()}"/>' for f in files)
    driver = (f'<xs:schema xmlns:xs="http://www.w3.org/2001/XMLSchema" '
              f'targetNamespace="urn:jobdesk:tests:driver">{imports}</xs:schema>')
    parser = etree.XMLParser(no_network=True)
    parser.resolvers.add(_Saved())
    return etree.XMLSchema(etree.fromstring(driver.encode(), parser,
                                            base_url=(SCHEMAS / "driver.xsd").as_uri()))


@pytest.fixture(scope="module")
def vosi_schema():
    return _schema("VOSICapabilities-v1.0.xsd", "VOSITables-v1.1.xsd", "TAPRegExt-v1.0.xsd",
                   "VODataService-v1.2.xsd")


@pytest.fixture(scope="module")
def tables(shared_tap):
    import requests
    doc = etree.fromstring(requests.get(f"{shared_tap.url}/tables", timeout=30).content)
    return doc


def test_capabilities_validate_and_declare_the_adql_21_features(shared_tap, http, vosi_schema):
    doc = etree.fromstring(http.get(f"{shared_tap.url}/capabilities").content)
    vosi_schema.assertValid(doc)              # VOSI 1.1 + TAPRegExt 1.0 + VODataService 1.2
    declared = {(f.getparent().get("type").rsplit("#", 1)[1], f.findtext("form"))
                for f in doc.iter("feature")}
    # ADQL 2.1 §4's optional groups (type URIs from memory) the translator accepts, each
    # checked below by running a query that uses it.
    for pair in [("features-adql-string", "LOWER"), ("features-adql-string", "ILIKE"),
                 ("features-adql-sets", "UNION"), ("features-adql-sets", "EXCEPT"),
                 ("features-adql-sets", "INTERSECT"), ("features-adql-common-table", "WITH"),
                 ("features-adql-type", "CAST"), ("features-adql-conditional", "COALESCE"),
                 ("features-adql-offset", "OFFSET"), ("features-adql-geo", "CENTROID"),
                 ("features-adqlgeo", "CONTAINS")]:
        assert pair in declared, pair
    assert not {form for _, form in declared} & {"IN_UNIT", "REGION"}   # refused: not declared


def test_every_declared_string_set_and_cte_feature_runs(shared_tap, http, tables):
    table = tables.findtext(".//table/name")
    column = tables.findtext(".//table/column/name")
    queries = [
        f"SELECT TOP 1 LOWER('AbC') AS a, UPPER('x') AS b FROM {table}",
        f"SELECT TOP 1 {column} FROM {table} WHERE 'Ab' ILIKE 'ab'",
        f"SELECT {column} FROM {table} WHERE 1=0 UNION SELECT {column} FROM {table} WHERE 1=0",
        f"SELECT {column} FROM {table} WHERE 1=0 EXCEPT SELECT {column} FROM {table} WHERE 1=0",
        f"SELECT {column} FROM {table} WHERE 1=0 INTERSECT SELECT {column} FROM {table} WHERE 1=0",
        f"WITH t AS (SELECT TOP 2 {column} FROM {table}) SELECT * FROM t",
        f"SELECT TOP 1 CAST(1 AS DOUBLE PRECISION) AS c FROM {table}",
        f"SELECT TOP 1 COALESCE(NULL, 2) AS c FROM {table}",
        f"SELECT {column} FROM {table} ORDER BY {column} OFFSET 1",
    ]
    for adql in queries:
        answer = http.post(f"{shared_tap.url}/sync", data={"LANG": "ADQL", "QUERY": adql,
                                                             "MAXREC": "3"})
        assert answer.status_code == 200 and b'value="ERROR"' not in answer.content, adql


def test_tableset_and_each_table_resource_validate(shared_tap, http, vosi_schema, tables):
    vosi_schema.assertValid(tables)
    names = [n.text for n in tables.iterfind(".//table/name")]
    assert names
    for name in names:
        # VOSI 1.1 §3.4: a child resource per table, {tables}/{name}, a vosi:table document.
        answer = http.get(f"{shared_tap.url}/tables/{quote(name)}")
        assert answer.status_code == 200, name
        doc = etree.fromstring(answer.content)
        vosi_schema.assertValid(doc)
        assert doc.tag == f"{{{NS['vosi']}}}table" and doc.findtext("name") == name
        listed = tables.xpath(f".//table[name='{name}']/column/name/text()")
        assert doc.xpath("column/name/text()") == listed
    assert http.get(f"{shared_tap.url}/tables/no_such.table").status_code == 404


def test_job_documents_validate_against_the_uws_11_recommendation(shared_tap, http, tables):
    schema = _schema("UWS-1.1.xsd")
    table = tables.findtext(".//table/name")
    column = tables.findtext(".//table/column/name")
    created = http.post(f"{shared_tap.url}/async", allow_redirects=False,
                        data={"LANG": "ADQL", "QUERY": f"SELECT TOP 3 {column} FROM {table}"})
    job_url = created.headers["Location"]
    schema.assertValid(etree.fromstring(http.get(job_url).content))          # PENDING
    http.post(f"{job_url}/phase", data={"PHASE": "RUN"})
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        doc = etree.fromstring(http.get(job_url, params={"WAIT": "5"}).content)
        schema.assertValid(doc)
        if doc.findtext("uws:phase", namespaces=NS) == "COMPLETED":
            break
    assert doc.findtext("uws:phase", namespaces=NS) == "COMPLETED"
    schema.assertValid(etree.fromstring(http.get(f"{shared_tap.url}/async").content))  # job list
    # DALI 1.1 §3.3.3 timestamps: UTC, ending in Z.
    assert doc.findtext("uws:creationTime", namespaces=NS).endswith("Z")


def test_result_votable_validates_and_aggregate_ucds_pass_the_strict_reader(shared_tap, http,
                                                                             tables, tmp_path):
    from astropy.io.votable import parse
    from astropy.io.votable.ucd import check_ucd

    votable_schema = etree.XMLSchema(etree.parse(str(SCHEMAS / "VOTable-1.4.xsd")))
    with_ucd = [(t.findtext("name"), c.findtext("name"), c.findtext("ucd"))
                for t in tables.iterfind(".//table") for c in t.iterfind("column")
                if c.findtext("ucd") and c.findtext("dataType") in ("double", "float", "int",
                                                                      "long", "short")]
    assert with_ucd
    table, column, ucd = with_ucd[0]
    adql = (f"SELECT AVG({column}) AS m, MIN({column}) AS lo, MAX({column}) AS hi "
            f"FROM {table}")
    answer = http.post(f"{shared_tap.url}/sync", data={"LANG": "ADQL", "QUERY": adql})
    votable_schema.assertValid(etree.fromstring(answer.content))     # IVOA VOTable 1.4 XSD
    path = tmp_path / "agg.vot"
    path.write_bytes(answer.content)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fields = parse(str(path), verify="exception").get_first_table().fields
    for field in fields:
        # astropy's UCD1+ check with the controlled vocabulary: a secondary-only word (stat.*)
        # may not come first.
        assert check_ucd(field.ucd, check_controlled_vocabulary=True), field.ucd
        assert field.ucd.split(";")[0] == ucd.split(";")[0]


def test_error_and_aborted_job_documents_validate(shared_tap, http, tables):
    schema = _schema("UWS-1.1.xsd")
    table = tables.findtext(".//table/name")
    for query, action, wanted in (("SELEKT nothing FROM nowhere", "RUN", "ERROR"),
                                  (f"SELECT * FROM {table}", "ABORT", "ABORTED")):
        job_url = http.post(f"{shared_tap.url}/async", allow_redirects=False,
                            data={"LANG": "ADQL", "QUERY": query}).headers["Location"]
        http.post(f"{job_url}/phase", data={"PHASE": action})
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            doc = etree.fromstring(http.get(job_url, params={"WAIT": "5"}).content)
            if doc.findtext("uws:phase", namespaces=NS) == wanted:
                break
        schema.assertValid(doc)                      # errorSummary in its place (UWS 1.1)
        assert doc.findtext("uws:phase", namespaces=NS) == wanted
