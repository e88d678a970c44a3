// Validate one glTF 2.0 asset (.gltf or .glb) with the Khronos glTF validator and print its
// JSON report on stdout. Usage: node validate_gltf.mjs VALIDATOR_DIR ASSET
// VALIDATOR_DIR is the installed npm package folder (node_modules/gltf-validator).
import { readFileSync } from "node:fs";
import { createRequire } from "node:module";
import path from "node:path";

const [validatorDir, asset] = process.argv.slice(2);
if (!validatorDir || !asset) {
  console.error("usage: node validate_gltf.mjs VALIDATOR_DIR ASSET");
  process.exit(2);
}
const require = createRequire(import.meta.url);
const validator = require(path.resolve(validatorDir));
const bytes = new Uint8Array(readFileSync(asset));
try {
  const report = await validator.validateBytes(bytes, {
    uri: path.basename(asset),
    maxIssues: 0,
    writeTimestamp: false,
  });
  process.stdout.write(JSON.stringify(report));
} catch (err) {
  console.error(String(err));
  process.exit(3);
}
