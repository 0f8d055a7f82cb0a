"""Every JSON success answer is described in /openapi.json, and the chart answers name their measures."""

from __future__ import annotations


def test_every_json_operation_documents_its_success_answer(client):
    spec = client.get("/openapi.json").json()
    missing = []
    for path, ops in spec["paths"].items():
        for method, op in ops.items():
            ok = next((op["responses"][c] for c in ("200", "201", "202") if c in op["responses"]), None)
            content = (ok or {}).get("content", {})
            if "application/json" in content and not content["application/json"].get("schema"):
                missing.append(f"{method.upper()} {path}")
            elif "application/json" in content and content["application/json"]["schema"] == {}:
                missing.append(f"{method.upper()} {path}")
    assert not missing, missing


def test_the_series_answer_names_each_measure(client):
    schema = client.get("/openapi.json").json()["components"]["schemas"]["SeriesAnswer"]
    props = set(schema["properties"])
    assert {"half_order_velocity_rms_mm_s", "one_x_velocity_rms_mm_s", "overall_velocity_rms_mm_s",
            "half_order_to_1x_ratio", "trend"} <= props
    assert not [p for p in props if p.endswith(("velocity", "amplitude", "_mm_s")) and "_rms_" not in p
                and "_peak_" not in p]
