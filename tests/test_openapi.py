"""The OpenAPI document lists the one error shape on every route that can refuse."""

from __future__ import annotations

from fastapi.testclient import TestClient


def test_error_shape_is_documented(client: TestClient) -> None:
    doc = client.get("/openapi.json").json()
    schema = doc["components"]["schemas"]["ErrorResponse"]
    assert schema["properties"].keys() == {"error"}
    assert "HTTPValidationError" not in doc["components"]["schemas"]
    for path, ops in doc["paths"].items():
        if path in ("/healthz",):
            continue
        for method, op in ops.items():
            errors = {code for code in op["responses"] if code.startswith(("4", "5"))}
            assert errors, f"{method.upper()} {path} lists no error responses"
            for code in errors:
                ref = op["responses"][code]["content"]["application/json"]["schema"]["$ref"]
                assert ref.endswith("/ErrorResponse"), (path, method, code)


def test_scoring_routes_document_bodies(client: TestClient) -> None:
    doc = client.get("/openapi.json").json()
    post = doc["paths"]["/v1/recommendations"]["post"]
    assert post["requestBody"]["content"]["application/json"]["schema"]["$ref"].endswith(
        "/RecommendationRequest"
    )
    assert {"200", "201"} <= set(post["responses"])
    assert client.get("/docs").status_code == 200
