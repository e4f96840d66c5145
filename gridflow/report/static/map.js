/* gridflow report: the interactive map. Reads the JSON payload written beside it, draws it with
   the inlined map library on a flat plane (local metres, no tiles) and fetches nothing. */
(function () {
  "use strict";
  var el = document.getElementById("gf-map");
  var src = document.getElementById("gf-map-data");
  if (!el || !src || typeof L === "undefined") { return; }
  var raw = src.textContent.replace(/^\s*<!\[CDATA\[/, "").replace(/\]\]>\s*$/, "");
  var D = JSON.parse(raw);
  var U = D.units;

  function esc(s) {
    return String(s).replace(/[&<>"']/g, function (c) {
      return {"&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;"}[c];
    });
  }
  function num(v) { return v === null || v === undefined ? "\u2013" : String(v); }
  function hex(c) { return [1, 3, 5].map(function (i) { return parseInt(c.substr(i, 2), 16); }); }
  var stops = D.ramp.map(hex);
  function ramp(v) {
    if (v === null || v === undefined) { return "#9aa3ad"; }
    var lo = D.pressureRange[0], hi = D.pressureRange[1];
    var t = hi > lo ? Math.min(1, Math.max(0, (v - lo) / (hi - lo))) : 0.5;
    var k = t * (stops.length - 1), i = Math.min(stops.length - 2, Math.floor(k)), f = k - i;
    var c = [0, 1, 2].map(function (j) {
      return Math.round(stops[i][j] + f * (stops[i + 1][j] - stops[i][j]));
    });
    return "rgb(" + c.join(",") + ")";
  }
  function flagNames(bits, names) {
    var out = [];
    for (var k = 0; k < names.length; k++) {
      if (bits & (1 << k)) { out.push(names[k].replace(/_/g, " ")); }
    }
    return out.join(", ");
  }
  function ll(x, y) { return L.latLng(y, x); }

  var map = L.map(el, {crs: L.CRS.Simple, preferCanvas: true, minZoom: -14, maxZoom: 8,
                       zoomSnap: 0.25, attributionControl: false});
  var bounds = L.latLngBounds(ll(D.extent[0], D.extent[1]), ll(D.extent[2], D.extent[3]));
  map.fitBounds(bounds.pad(0.05));

  function nodePopup(i) {
    var N = D.nodes, rows = "";
    for (var s = 0; s < D.scenarios.length; s++) {
      rows += "<tr><th>" + esc(D.scenarios[s]) + "</th>" +
        '<td data-field="pressure" data-scenario="' + esc(D.scenarios[s]) + '">' +
        num(N.p[s][i]) + "</td>" +
        '<td data-field="head" data-scenario="' + esc(D.scenarios[s]) + '">' +
        num(N.head[s][i]) + "</td>" +
        '<td data-field="flags" data-scenario="' + esc(D.scenarios[s]) + '">' +
        esc(flagNames(N.flags[s][i], D.nodeFlags)) + "</td></tr>";
    }
    return '<div class="gf-pop" data-kind="node" data-id="' + esc(N.id[i]) + '"><b>' +
      esc(N.kind[i]) + " " + esc(N.id[i]) + "</b><br/>zone " + esc(N.zone[i]) +
      ", ground " + num(N.elev[i]) + " " + esc(U.len) +
      "<table><tr><th>scenario</th><th>pressure [" + esc(U.pressure) + "]</th><th>head [" +
      esc(U.len) + "]</th><th>flags</th></tr>" + rows + "</table></div>";
  }
  function mainPopup(i) {
    var M = D.mains, rows = "";
    for (var s = 0; s < D.scenarios.length; s++) {
      rows += "<tr><th>" + esc(D.scenarios[s]) + "</th><td>" + num(M.q[s][i]) + "</td><td>" +
        num(M.v[s][i]) + "</td><td>" + num(M.uhl[s][i]) + "</td><td>" +
        esc(flagNames(M.flags[s][i], D.pipeFlags)) + "</td></tr>";
    }
    return '<div class="gf-pop" data-kind="main" data-id="' + esc(M.id[i]) + '"><b>main ' +
      esc(M.id[i]) + "</b><br/>diameter " + num(M.dia[i]) + " " + esc(U.diameter) +
      ", length " + num(M.len[i]) + " " + esc(U.len) +
      "<table><tr><th>scenario</th><th>flow [" + esc(U.flow) + "]</th><th>velocity [" +
      esc(U.velocity) + "]</th><th>unit head loss [" + esc(U.uhl) + "]</th><th>flags</th></tr>" +
      rows + "</table></div>";
  }
  function hydrantPopup(H, i) {
    return '<div class="gf-pop" data-kind="hydrant" data-id="' + esc(H.id[i]) +
      '"><b>hydrant ' + esc(H.id[i]) + "</b> (node " + esc(H.node[i]) + ", zone " +
      esc(H.zone[i]) + ")<table>" +
      "<tr><th>class</th><td>" + esc(H.cls[i]) + "</td></tr>" +
      "<tr><th>static pressure [" + esc(U.pressure) + "]</th><td>" + num(H["static"][i]) +
      "</td></tr><tr><th>required [" + esc(U.flow) + "]</th><td>" + num(H.required[i]) +
      "</td></tr><tr><th>available [" + esc(U.flow) + "]</th><td>" + num(H.available[i]) +
      "</td></tr><tr><th>residual at required [" + esc(U.pressure) + "]</th><td>" +
      num(H.residual[i]) + "</td></tr><tr><th>meets required</th><td>" +
      (H.meets[i] ? "yes" : "no") + "</td></tr><tr><th>limited by</th><td>" +
      esc(H.limitedBy[i]) + "</td></tr></table>" +
      "<i>Model estimate: confirm by a field flow test.</i></div>";
  }
  function findingPopup(F, i) {
    return '<div class="gf-pop" data-kind="finding"><b>' + esc(F.severity[i]) + ": " +
      esc(F.kind[i]) + "</b><br/>" + esc(F.layer[i]) + " " + esc(F.feature_id[i]) +
      "<br/>" + esc(F.message[i]) + "</div>";
  }

  var nodeMarkers = {};
  function pressureLayer(s) {
    // filled when first shown: a large network's scenarios are not all drawn up front
    var g = L.layerGroup(), filled = false;
    g.on("add", function () { if (!filled) { filled = true; fillPressure(g, s); } });
    return g;
  }
  function fillPressure(g, s) {
    var C = D.cells[s], N = D.nodes;
    if (C) {
      for (var c = 0; c < C.x.length; c++) {
        L.rectangle([ll(C.x[c], C.y[c]), ll(C.x[c] + C.size, C.y[c] + C.size)],
                    {stroke: false, fillColor: ramp(C.v[c]), fillOpacity: 0.75,
                     interactive: true})
          .bindTooltip(C.n[c] + " junctions; lowest " + num(C.v[c]) + " " + U.pressure)
          .addTo(g);
      }
    }
    var r = N.id.length > 1000 ? 3.5 : 5;
    nodeMarkers[s] = {};
    for (var i = 0; i < N.id.length; i++) {
      var fl = N.flags[s][i], fixed = N.kind[i] !== "junction";
      var unsup = fl & (1 << (D.nodeFlags.length - 1));
      var m = L.circleMarker(ll(N.x[i], N.y[i]), {
        radius: fixed ? r + 3 : (fl ? r + 1 : r), weight: fl ? 2 : 1,
        color: fixed ? "#22313f" : (fl ? "#111111" : "#ffffff"),
        fillColor: fixed ? "#22313f" : (unsup ? "#ffffff" : ramp(N.p[s][i])), fillOpacity: 1});
      m.bindPopup(nodePopup.bind(null, i), {maxWidth: 420});
      m.addTo(g);
      nodeMarkers[s][N.id[i]] = m;
    }
  }
  function mainsLayer(only, flagged) {
    var g = L.layerGroup(), M = D.mains, list = only;
    for (var k = 0; k < list.length; k++) {
      var i = list[k], q = 4 * i, color = "#9aa3ad", w = 1.5;
      if (flagged) {
        var bits = 0;
        for (var s = 0; s < D.scenarios.length; s++) { bits |= M.flags[s][i]; }
        color = bits === 3 ? D.flagColors.both :
          (bits & 1 ? D.flagColors.high_velocity : D.flagColors.high_headloss);
        w = 4;
      }
      L.polyline([ll(M.seg[q], M.seg[q + 1]), ll(M.seg[q + 2], M.seg[q + 3])],
                 {color: color, weight: w, opacity: 0.9})
        .bindPopup(mainPopup.bind(null, i), {maxWidth: 460}).addTo(g);
    }
    return g;
  }
  function hydrantLayer() {
    var g = L.layerGroup(), H = D.hydrants;
    if (!H) { return g; }
    for (var i = 0; i < H.id.length; i++) {
      L.circleMarker(ll(H.x[i], H.y[i]), {
        radius: 6, weight: H.meets[i] ? 1 : 3, color: H.meets[i] ? "#22313f" : "#111111",
        fillColor: D.fireColors[H.cls[i]] || D.fireColors[""], fillOpacity: 1})
        .bindPopup(hydrantPopup.bind(null, H, i)).addTo(g);
    }
    return g;
  }
  function findingsLayer() {
    var g = L.layerGroup(), F = D.findings;
    if (!F) { return g; }
    for (var i = 0; i < F.x.length; i++) {
      L.circleMarker(ll(F.x[i], F.y[i]), {
        radius: 7, weight: 2, color: "#22313f",
        fillColor: D.severityColors[F.severity[i]] || "#9aa3ad", fillOpacity: 0.95})
        .bindPopup(findingPopup.bind(null, F, i)).addTo(g);
    }
    return g;
  }

  var SEG_COLORS = {cuts_off: "#d55e00", oversized: "#e69f00", cannot_isolate: "#78288c",
                    critical: "#0072b2"};
  var SEG_WORDS = {cuts_off: "closing it cuts off other customers",
                   oversized: "larger than the size bounds",
                   cannot_isolate: "no valve can isolate it", critical: "among the most critical"};
  function segmentPopup(S, i) {
    return '<div class="gf-pop" data-kind="segment" data-id="' + esc(S.id[i]) +
      '"><b>segment ' + esc(S.id[i]) + "</b> (" + esc(SEG_WORDS[S.kind[i]]) + ")<table>" +
      "<tr><th>isolating valves</th><td>" + esc(S.valves[i]) + "</td></tr>" +
      "<tr><th>main [" + esc(U.len) + "]</th><td>" + num(S.length[i]) + "</td></tr>" +
      "<tr><th>meters</th><td>" + num(S.meters[i]) + "</td></tr>" +
      "<tr><th>segments also cut off</th><td>" + num(S.cutOff[i]) + " (" +
      num(S.cutMeters[i]) + " meters)</td></tr>" +
      "<tr><th>meters out of water / below minimum</th><td>" + num(S.out[i]) + " / " +
      num(S.low[i]) + "</td></tr><tr><th>criticality rank</th><td>" + num(S.rank[i]) +
      "</td></tr></table><i>From the valves as mapped.</i></div>";
  }
  function segmentsLayer() {
    var g = L.layerGroup(), S = D.segments;
    if (!S) { return g; }
    for (var i = 0; i < S.id.length; i++) {
      var parts = S.lines[i].map(function (flat) {
        var pts = [];
        for (var j = 0; j + 1 < flat.length; j += 2) { pts.push(ll(flat[j], flat[j + 1])); }
        return pts;
      });
      L.polyline(parts, {color: SEG_COLORS[S.kind[i]] || "#0072b2", weight: 5, opacity: 0.8})
        .bindPopup(segmentPopup.bind(null, S, i), {maxWidth: 420}).addTo(g);
    }
    return g;
  }
  function flowTestsLayer() {
    var g = L.layerGroup(), T = D.flowTests;
    if (!T) { return g; }
    for (var i = 0; i < T.id.length; i++) {
      L.circleMarker(ll(T.x[i], T.y[i]), {
        radius: 8, weight: 3, color: T.out[i] ? "#d55e00" : "#009e73", fillColor: "#ffffff",
        fillOpacity: 1})
        .bindPopup('<div class="gf-pop" data-kind="flow_test" data-id="' + esc(T.id[i]) +
          '"><b>flow test ' + esc(T.id[i]) + "</b><table><tr><th>field residual [" +
          esc(U.pressure) + "]</th><td>" + num(T.fieldResidual[i]) + "</td></tr>" +
          "<tr><th>model residual</th><td>" + num(T.modelResidual[i]) + "</td></tr>" +
          "<tr><th>model minus field</th><td>" + num(T.diff[i]) + "</td></tr>" +
          "<tr><th>out of tolerance</th><td>" + (T.out[i] ? "yes" : "no") + "</td></tr>" +
          (T.problem[i] ? "<tr><th>left out</th><td>" + esc(T.problem[i]) + "</td></tr>" : "") +
          "</table></div>").addTo(g);
    }
    return g;
  }

  var all = [];
  for (var k = 0; k < D.mains.id.length; k++) { all.push(k); }
  var base = {}, overlays = {};
  var pressure = D.scenarios.map(function (s, i) { return pressureLayer(i); });
  D.scenarios.forEach(function (s, i) { base["Pressure: " + s] = pressure[i]; });
  overlays["Mains"] = mainsLayer(all, false);
  overlays["Flagged mains"] = mainsLayer(D.mains.flagged, true);
  overlays["Fire-flow classes"] = hydrantLayer();
  overlays["Findings"] = findingsLayer();
  if (D.segments) { overlays["Valve segments to look at"] = segmentsLayer(); }
  if (D.flowTests) { overlays["Field flow tests"] = flowTestsLayer(); }
  overlays["Mains"].addTo(map);
  pressure[0].addTo(map);
  overlays["Flagged mains"].addTo(map);
  overlays["Findings"].addTo(map);
  L.control.layers(base, overlays, {collapsed: false}).addTo(map);
  L.control.scale({imperial: U.len === "ft", metric: U.len !== "ft"}).addTo(map);
  var legend = L.control({position: "bottomright"});
  legend.onAdd = function () {
    var div = L.DomUtil.create("div", "gf-legend");
    div.innerHTML = "<b>pressure [" + esc(U.pressure) + "]</b><br/>" +
      '<span class="gf-ramp" style="background:linear-gradient(to right,' +
      D.ramp.join(",") + ')"></span><br/>' + num(D.pressureRange[0]) +
      '<span style="float:right">' + num(D.pressureRange[1]) + "</span><br/>" +
      "dark ring: flagged; white: not supplied; large dark: source or tank" +
      (D.counts.aggregated ? "<br/>squares: lowest pressure in the cell" : "");
    return div;
  };
  legend.addTo(map);

  window.gridflowMap = {
    map: map, layers: {base: base, overlays: overlays},
    nodeMarker: function (scenario, id) {
      var s = D.scenarios.indexOf(scenario);
      return s < 0 || !nodeMarkers[s] ? null : (nodeMarkers[s][id] || null);
    },
    flaggedNode: function (scenario) {
      var s = D.scenarios.indexOf(scenario), N = D.nodes;
      for (var i = 0; i < N.id.length; i++) { if (N.flags[s][i] & 1) { return N.id[i]; } }
      return null;
    }
  };
}());
