// Minimal VS Code client for `latchwatch serve` (vscode-languageclient over stdio).
const vscode = require("vscode");
const { LanguageClient } = require("vscode-languageclient/node");

const KEYS = ["tech", "python", "timeout", "debounce", "runOn", "disable", "severity", "trustedFolders"];
let client;

function settings() {
  const config = vscode.workspace.getConfiguration("latchwatch");
  const out = {};
  for (const key of KEYS) {
    const value = config.get(key);
    if (value !== null && value !== undefined) out[key] = value;
  }
  return { latchwatch: out };
}

function activate(context) {
  const [command, ...args] = vscode.workspace.getConfiguration("latchwatch").get("command");
  client = new LanguageClient(
    "latchwatch",
    "latchwatch",
    { command, args },
    {
      documentSelector: [{ scheme: "file", language: "python" }],
      initializationOptions: settings(),
      synchronize: { configurationSection: "latchwatch" },
    }
  );
  context.subscriptions.push(client);
  return client.start();
}

function deactivate() {
  return client ? client.stop() : undefined;
}

module.exports = { activate, deactivate };
