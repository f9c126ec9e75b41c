// A gateway's OPC UA server (node-opcua, an independent OPC UA stack): one Double[] samples variable per sensor
// with its sample rate as a property, one Int16[] variable (counts, scaled by the client), and EngineeringUnits.
// stdin commands: "write N" writes N blocks back to back (no pause between writes); "quit" stops.
// stdout: "ready <endpoint>" once listening, "wrote N" after a write burst.
"use strict";
const opcua = require("node-opcua");
const readline = require("readline");

async function main() {
  const port = parseInt(process.argv[2], 10);
  const fs = parseFloat(process.argv[3] || "25600");
  const n = parseInt(process.argv[4] || "2560", 10);
  const server = new opcua.OPCUAServer({ port, hostname: "127.0.0.1", resourcePath: "/gateway",
    securityPolicies: [opcua.SecurityPolicy.None], securityModes: [opcua.MessageSecurityMode.None],
    allowAnonymous: true,
    // exception-based reporting: every write is delivered (a gateway set up for block data); "coalesce" keeps
    // node-opcua's default, which merges the changes within its 100 ms minimum sampling rate
    serverCapabilities: process.argv[6] === "coalesce" ? undefined : { minSupportedSampleRate: 0 } });
  await server.initialize();
  const ns = server.engine.addressSpace.registerNamespace("urn:fennick:quarry-lane:gateway");
  const folder = ns.addObject({ organizedBy: server.engine.addressSpace.rootFolder.objects, browseName: "QL-GW1",
    nodeId: "s=QL-GW1" });
  const units = process.argv[5] === "g" ? null : opcua.standardUnits.metre_per_second_squared;
  const make = (name, dataType, arrayType) => {
    const v = ns.addAnalogDataItem({ componentOf: folder, browseName: name, nodeId: `s=${name}`, dataType,
      valueRank: 1, arrayDimensions: [n], engineeringUnitsRange: { low: -50, high: 50 },
      engineeringUnits: units || opcua.makeEUInformation("K40", "gn", "standard acceleration of free fall"),
      minimumSamplingInterval: 0 });
    v.minimumSamplingInterval = 0;  // exception-based: every write is a change notification (OPC 10000-4 5.12.1.2)
    ns.addVariable({ propertyOf: v, browseName: "SampleRate", nodeId: `s=${name}/SampleRate`, dataType: "Double",
      value: { dataType: opcua.DataType.Double, value: fs } });
    v.setValueFromSource({ dataType: opcua.DataType[dataType], arrayType: opcua.VariantArrayType.Array,
      value: new arrayType(n) }, opcua.StatusCodes.BadWaitingForInitialData);
    return v;
  };
  const fvar = make("QL-P101-DE-H", "Double", Float64Array);
  const ivar = make("QL-P101-NDE-H", "Int16", Int16Array);
  await server.start();
  console.log(`ready opc.tcp://127.0.0.1:${port}/gateway ${ns.index}`);
  const t0 = Date.UTC(2026, 11, 2, 6, 0, 0);
  let seq = 0;
  const rl = readline.createInterface({ input: process.stdin });
  for await (const line of rl) {
    const [cmd, arg] = line.trim().split(/\s+/);
    if (cmd === "quit") break;
    if (cmd !== "write") continue;
    const count = parseInt(arg, 10);
    for (let k = 0; k < count; k++, seq++) {
      const f = new Float64Array(n);
      const c = new Int16Array(n);
      for (let i = 0; i < n; i++) {
        const x = 9.80665 * Math.sin(2 * Math.PI * 47.3 * (seq * n + i) / fs);  // 1 g peak at 47.3 Hz, in m/s²
        f[i] = x;
        c[i] = Math.round(x / 0.001);  // counts of 0.001 m/s²
      }
      // the block's end time: t0 + (seq + 1) n / fs (ms resolution in a JavaScript Date; picoseconds carry the rest)
      const endMs = t0 + ((seq + 1) * n * 1000) / fs;
      const ts = new Date(Math.floor(endMs));
      fvar.setValueFromSource({ dataType: opcua.DataType.Double, arrayType: opcua.VariantArrayType.Array, value: f },
        opcua.StatusCodes.Good, ts);
      ivar.setValueFromSource({ dataType: opcua.DataType.Int16, arrayType: opcua.VariantArrayType.Array, value: c },
        opcua.StatusCodes.Good, ts);
    }
    console.log(`wrote ${count}`);
  }
  await server.shutdown(0);
  process.exit(0);
}
main().catch((err) => { console.error(err); process.exit(1); });
