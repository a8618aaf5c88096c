# Writes a C++ source defining mdp::server::kOpenApiDocument from a JSON file.
# Usage: cmake -DINPUT=openapi.json -DOUTPUT=openapi_document.cc -P embed_openapi.cmake
file(READ "${INPUT}" MDP_DOCUMENT)
file(WRITE "${OUTPUT}.tmp"
  "// Generated from api-schema/openapi.json by scripts/embed_openapi.cmake. Do not edit.\n"
  "#include \"server/http_server.h\"\n"
  "namespace mdp::server {\n"
  "const char* const kOpenApiDocument = R\"mdpopenapi(${MDP_DOCUMENT})mdpopenapi\";\n"
  "}  // namespace mdp::server\n")
file(RENAME "${OUTPUT}.tmp" "${OUTPUT}")
