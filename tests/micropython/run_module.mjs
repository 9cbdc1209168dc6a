// Run one Python source file under the pinned MicroPython WebAssembly build.
//
// Usage: node run_module.mjs FILE.py
//
// Whatever the Python code prints goes to stdout. If the Python code raises
// (other than SystemExit with code 0/None), the traceback goes to stderr and
// the process exits with status 1. Usage or loader errors exit with status 2.
// No network is used: the interpreter and its .wasm come from node_modules.

import { readFileSync } from "node:fs";
import { loadMicroPython } from "@micropython/micropython-webassembly-pyscript";

const HEAP_SIZE = 64 * 1024 * 1024;
const PYSTACK = 64 * 1024;

function main() {
  if (process.argv.length !== 3) {
    process.stderr.write("usage: node run_module.mjs FILE.py\n");
    return 2;
  }
  const source = readFileSync(process.argv[2], "utf8");
  return loadMicroPython({
    heapsize: HEAP_SIZE,
    pystack: PYSTACK,
    linebuffer: false,
    stdout: (bytes) => process.stdout.write(bytes),
    stderr: (bytes) => process.stderr.write(bytes),
  }).then((mp) => {
    try {
      mp.runPython(source);
      return 0;
    } catch (error) {
      if (error && error.name === "PythonError") {
        if (error.type === "SystemExit") {
          const match = /SystemExit:?\s*(\S*)/.exec(String(error.message));
          const code = match ? match[1] : "";
          if (code === "" || code === "0" || code === "None") {
            return 0;
          }
          process.stderr.write(String(error.message));
          return /^\d+$/.test(code) ? Number(code) : 1;
        }
        process.stderr.write(String(error.message));
        if (!String(error.message).endsWith("\n")) {
          process.stderr.write("\n");
        }
        return 1;
      }
      throw error;
    }
  });
}

Promise.resolve()
  .then(main)
  .then(
    (code) => {
      process.exitCode = code;
    },
    (error) => {
      process.stderr.write(`run_module.mjs: ${error && error.stack ? error.stack : error}\n`);
      process.exitCode = 2;
    },
  );
