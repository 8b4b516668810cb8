"""Validates an OpenAPI document with openapi-spec-validator (PyPI).

Usage: python validate_openapi.py openapi.json
Exits non-zero, printing the reason, when the document is not valid OpenAPI 3.
"""

import json
import sys

from openapi_spec_validator import validate


def main() -> int:
    with open(sys.argv[1], encoding="utf-8") as handle:
        document = json.load(handle)
    validate(document)
    print(f"valid OpenAPI {document.get('openapi')}: {len(document.get('paths', {}))} paths")
    return 0


if __name__ == "__main__":
    sys.exit(main())
