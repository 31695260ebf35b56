// Validate a .gltf or .glb file with the Khronos glTF validator (npm package gltf-validator)
// and print its JSON report on stdout. Usage: node tests/gltf_validate.mjs FILE
import fs from "node:fs";
import path from "node:path";
import validator from "gltf-validator";

const file = process.argv[2];
if (!file) {
  console.error("usage: node gltf_validate.mjs FILE");
  process.exit(2);
}
const full = path.resolve(file);
const asset = new Uint8Array(fs.readFileSync(full));
try {
  const report = await validator.validateBytes(asset, {
    uri: path.basename(full),
    maxIssues: 100,
    externalResourceFunction: (uri) =>
      new Promise((resolve, reject) => {
        fs.readFile(path.resolve(path.dirname(full), decodeURIComponent(uri)), (err, data) =>
          err ? reject(err.toString()) : resolve(new Uint8Array(data)));
      }),
  });
  console.log(JSON.stringify(report));
} catch (err) {
  console.error(String(err));
  process.exit(1);
}
