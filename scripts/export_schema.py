"""Regenerate calibration/bundle/bundle.schema.json from the bundle model (run after changing the schema)."""

import json
from pathlib import Path

from calibration.bundle.schema import Bundle

target = Path(__file__).resolve().parents[1] / "calibration" / "bundle" / "bundle.schema.json"
target.write_text(json.dumps(Bundle.model_json_schema(), indent=2, sort_keys=True) + "\n")
print(f"wrote {target}")
