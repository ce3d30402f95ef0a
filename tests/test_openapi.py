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


def test_bounds_are_documented(client: TestClient) -> None:
    doc = client.get("/openapi.json").json()
    schemas = doc["components"]["schemas"]
    request = schemas["RecommendationRequest"]["properties"]
    assert request["attributes"]["maxProperties"] == 32
    (values,) = request["attributes"]["patternProperties"].values()
    assert values["type"] == "string" and values["maxLength"] == 64
    assert values["pattern"] == r"^[^\x00-\x1f|]+$"  # no control characters, no '|'
    assert request["attributes"]["propertyNames"]["maxLength"] == 64
    assert request["case_id"]["maxLength"] == 128
    version = next(
        p
        for p in doc["paths"]["/v1/policies/{name}/versions/{version}"]["get"]["parameters"]
        if p["name"] == "version"
    )
    assert version["schema"]["maximum"] == 2**31 - 1
    # The batch routes read their bodies themselves; the documented body is still the schema.
    for path, item in [
        ("/v1/recommendations/batch", "RecommendationRequest"),
        ("/v1/outcomes/batch", "OutcomeRequest"),
    ]:
        body = doc["paths"][path]["post"]["requestBody"]["content"]["application/json"]["schema"]
        assert body["properties"]["items"]["items"]["$ref"] == f"#/components/schemas/{item}"
        assert body["required"] == ["items"] and body["properties"]["items"]["minItems"] == 1
    observed = schemas["OutcomeRequest"]["properties"]["observed_at"]["description"]
    assert "not before the recommendation was issued, nor in the future" in observed


def test_bearer_scheme_is_declared_on_every_route_that_needs_a_key(client: TestClient) -> None:
    from tests.test_access import ACCESS, PUBLIC

    doc = client.get("/openapi.json").json()
    scheme = doc["components"]["securitySchemes"]["apiKey"]
    assert scheme["type"] == "http" and scheme["scheme"] == "bearer"
    for path, ops in doc["paths"].items():
        for method, op in ops.items():
            needs_key = ACCESS[(method.upper(), path)] != PUBLIC
            assert (op.get("security") == [{"apiKey": []}]) is needs_key, (method, path)


def test_docs_page_loads_only_from_this_host(client: TestClient) -> None:
    import re

    page = client.get("/docs")
    assert page.status_code == 200
    urls = re.findall(r'(?:src|href)="([^"]*)"', page.text)
    assert urls and all(u.startswith("/") and not u.startswith("//") for u in urls), urls
    assert "https://" not in page.text and "http://" not in page.text
    assert "validatorUrl" in page.text  # the public validator badge is off
    for url in urls:
        asset = client.get(url)
        assert asset.status_code == 200, url
        assert len(asset.content) > 500, url
    assert client.get("/docs/assets/index.html").status_code == 404
    assert client.get("/redoc").status_code == 404
