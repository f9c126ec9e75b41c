// An OPC UA client (node-opcua) reading edgevib's indicator namespace; prints one JSON document on stdout.
"use strict";
const opcua = require("node-opcua");
const { commonCodeToUInt } = require("node-opcua-data-access");

async function main() {
  const [endpoint, ns_uri, site, machine, point] = process.argv.slice(2);
  const client = opcua.OPCUAClient.create({ endpointMustExist: false, connectionStrategy: { maxRetry: 2 } });
  await client.connect(endpoint);
  const endpoints = (await client.getEndpoints()).map((e) => ({
    policy: e.securityPolicyUri.split("#").pop(), mode: opcua.MessageSecurityMode[e.securityMode],
    tokens: e.userIdentityTokens.map((t) => opcua.UserTokenType[t.tokenType]) }));
  const session = await client.createSession();
  const nsArray = (await session.readNamespaceArray());
  const idx = nsArray.indexOf(ns_uri);
  const base = `ns=${idx};s=${site}/${machine}/${point}`;
  const typeOf = async (nodeId) => {
    const refs = await session.browse({ nodeId, referenceTypeId: "HasTypeDefinition", browseDirection: opcua.BrowseDirection.Forward });
    return refs.references[0].nodeId.toString();
  };
  const prop = async (nodeId, name) => {
    const r = await session.translateBrowsePath(opcua.makeBrowsePath(nodeId, `/${name}`));
    const dv = await session.read({ nodeId: r.targets[0].targetId, attributeId: opcua.AttributeIds.Value });
    return dv.value.value;
  };
  const vel = `${base}/velocity_rms_mm_s`;
  const zone = `${base}/iso_zone`;
  const eu = await prop(vel, "EngineeringUnits");
  const range = await prop(vel, "EURange");
  const shaftEu = await prop(`${base}/shaft_hz`, "EngineeringUnits");
  const accEu = await prop(`${base}/acceleration_rms_g`, "EngineeringUnits");
  const velDv = await session.read({ nodeId: vel, attributeId: opcua.AttributeIds.Value });
  const zoneDv = await session.read({ nodeId: zone, attributeId: opcua.AttributeIds.Value });
  const enumStrings = (await prop(zone, "EnumStrings")).map((t) => t.text);
  const alarm = `${base}/alarm_state`;
  const alarmDv = await session.read({ nodeId: alarm, attributeId: opcua.AttributeIds.Value });
  const alarmStates = (await prop(alarm, "EnumStrings")).map((t) => t.text);
  const out = {
    endpoints,
    velocity: { type: await typeOf(vel), unitId: eu.unitId, display: eu.displayName.text, namespaceUri: eu.namespaceUri,
      range: [range.low, range.high], value: velDv.value.value, status: velDv.statusCode.name,
      sourceTimestamp: velDv.sourceTimestamp ? velDv.sourceTimestamp.toISOString() : null },
    shaftUnitId: shaftEu.unitId, accelerationUnitId: accEu.unitId,
    expected: { C16: commonCodeToUInt("C16"), HTZ: commonCodeToUInt("HTZ"), K40: commonCodeToUInt("K40"),
      hertz: opcua.standardUnits.hertz.unitId },
    zone: { type: await typeOf(zone), enumStrings, value: zoneDv.value.value, dataType: opcua.DataType[zoneDv.value.dataType],
      status: zoneDv.statusCode.name },
    alarm: { type: await typeOf(alarm), enumStrings: alarmStates, value: alarmDv.value.value },
  };
  await session.close();
  await client.disconnect();
  console.log(JSON.stringify(out));
}
main().catch((err) => { console.error(String(err && err.stack || err)); process.exit(1); });
