"""Validates an ESPI export (an Atom feed of ESPI resources) against the
published NAESB REQ.21 ESPI schema (espi.xsd, version 4.0.20231213, with the
atom.xsd it imports; copies in ../shared/reference/espi/) using the Python
package xmlschema, which resolves the W3C xml namespace locally.

Usage: validate_espi.py SCHEMA_DIR FILE. Prints JSON: {"valid", "errors",
"xmlschema", "schema_version"}.
"""
import json
import os
import sys

import xmlschema


def main():
    schema_dir, path = sys.argv[1], sys.argv[2]
    schema = xmlschema.XMLSchema(os.path.join(schema_dir, "espi.xsd"))
    errors = [str(e.reason or e.message)[:300] for e in schema.iter_errors(path)][:5]
    out = {
        "valid": not errors,
        "errors": errors,
        "xmlschema": xmlschema.__version__,
        "schema_version": schema.version,
    }
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
