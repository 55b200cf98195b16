// latchwatch page: zoom, pan, layer toggles, the drawing selector, click-to-zoom on
// findings, and the shapes of large drawings drawn once few enough are in view.
(function () {
  "use strict";
  var config = JSON.parse(document.getElementById("lw-config").textContent);
  var MARK_PX = 6, TAP_PX = 5, FONT_PX = 12, Q = 1000;  // coordinates are packed in thousandths
  var decoded = {};

  function scenes() { return Array.prototype.slice.call(document.querySelectorAll("svg.scene")); }
  function current() { return document.querySelector("svg.scene:not(.hidden)"); }
  function view(svg) { return svg.getAttribute("viewBox").split(/\s+/).map(Number); }
  function pixel(svg) {  // layout units per screen pixel (xMidYMid meet)
    var v = view(svg), w = svg.clientWidth || 1, h = svg.clientHeight || 1;
    return Math.max(v[2] / w, v[3] / h);
  }
  function setView(svg, v) { svg.setAttribute("viewBox", v.join(" ")); refresh(svg); }

  function refresh(svg) {
    var px = pixel(svg);
    svg.querySelectorAll("circle.marker").forEach(function (c) { c.setAttribute("r", MARK_PX * px); });
    svg.querySelectorAll("circle.halo").forEach(function (c) { c.setAttribute("r", (MARK_PX + 2.5) * px); });
    svg.querySelectorAll("rect.tapmark").forEach(function (r) {
      var s = TAP_PX * px;
      r.setAttribute("x", +r.dataset.x - s); r.setAttribute("y", +r.dataset.y - s);
      r.setAttribute("width", 2 * s); r.setAttribute("height", 2 * s);
    });
    svg.querySelectorAll("text").forEach(function (t) {
      t.setAttribute("font-size", FONT_PX * px);
      t.setAttribute("stroke-width", 3 * px);
      if (t.classList.contains("flabel")) { t.setAttribute("dx", (MARK_PX + 4) * px); t.setAttribute("dy", -(MARK_PX + 2) * px); }
    });
    svg.querySelectorAll("pattern.hatch").forEach(function (p) {
      p.setAttribute("patternTransform", "rotate(" + p.dataset.angle + ") scale(" + px + ")");
    });
    detail(svg);
  }

  // --- large drawings: packed shapes, drawn for the view when few enough ---------------
  function unpack(b64) {
    var bytes = Uint8Array.from(atob(b64), function (c) { return c.charCodeAt(0); });
    var stream = new Blob([bytes]).stream().pipeThrough(new DecompressionStream("deflate"));
    return new Response(stream).arrayBuffer().then(function (buf) { return new Int32Array(buf); });
  }
  function layerData(scene, key) {
    var id = scene + "/" + key;
    if (!decoded[id]) {
      var p = config.packed[scene][key];
      decoded[id] = Promise.all([unpack(p.r), unpack(p.p)]).then(function (a) {
        var r = a[0];
        for (var i = 4; i < r.length; i++) r[i] += r[i - 4];  // undo the per-column deltas
        return { rects: r, rings: a[1] };
      });
    }
    return decoded[id];
  }
  function num(v) { return (v / Q).toString(); }
  function detail(svg) {
    var scene = svg.dataset.scene, packed = config.packed[scene];
    if (!packed) return;
    var v = view(svg), home = svg.dataset.home.split(" ").map(Number);
    var share = Math.min(1, (v[2] * v[3]) / (home[2] * home[3]));
    var expected = 0;
    Object.keys(packed).forEach(function (k) {
      var g = svg.querySelector('g[data-layer="' + k + '"]');
      if (!g.classList.contains("off")) expected += packed[k].n * share;
    });
    var near = expected <= config.detail;
    Object.keys(packed).forEach(function (k) {
      var g = svg.querySelector('g[data-layer="' + k + '"]');
      var path = g.querySelector("path.detail"), over = g.querySelector("image.overview");
      if (!near) { path.setAttribute("d", ""); over.style.display = ""; return; }
      layerData(scene, k).then(function (data) {
        var x0 = v[0] * Q, y0 = v[1] * Q, x1 = (v[0] + v[2]) * Q, y1 = (v[1] + v[3]) * Q, out = [], r = data.rects;
        for (var i = 0; i < r.length; i += 4) {
          if (r[i] > x1 || r[i] + r[i + 2] < x0 || r[i + 1] > y1 || r[i + 1] + r[i + 3] < y0) continue;
          out.push("M" + num(r[i]) + " " + num(r[i + 1]) + "h" + num(r[i + 2]) + "v" + num(r[i + 3]) + "h" + num(-r[i + 2]) + "z");
        }
        var p = data.rings;
        for (var j = 0; j < p.length; j += 1 + 2 * p[j]) {
          var pts = [];
          for (var m = 0; m < p[j]; m++) pts.push(num(p[j + 1 + 2 * m]) + " " + num(p[j + 2 + 2 * m]));
          out.push("M" + pts.join("L") + "z");
        }
        path.setAttribute("d", out.join(""));
        over.style.display = "none";
      });
    });
  }

  // --- layers, drawings, findings -------------------------------------------------------
  function setLayer(svg, key, on) {
    svg.querySelectorAll('g[data-layer="' + key + '"]').forEach(function (g) { g.classList.toggle("off", !on); });
    var panel = document.querySelector('.panel[data-scene="' + svg.dataset.scene + '"]');
    var box = panel && panel.querySelector('input[data-layer="' + key + '"]');
    if (box) box.checked = on;
    detail(svg);
  }
  function showScene(n) {
    scenes().forEach(function (s) { s.classList.toggle("hidden", s.dataset.scene !== String(n)); });
    document.querySelectorAll(".panel").forEach(function (p) { p.classList.toggle("hidden", p.dataset.scene !== String(n)); });
    var select = document.getElementById("scene");
    if (select) select.value = String(n);
    refresh(current());
  }
  function zoomTo(svg, box) {
    var b = box.split(" ").map(Number), pad = Math.max(b[2] - b[0], b[3] - b[1]) * 0.35 + 0.5;
    setView(svg, [b[0] - pad, -b[3] - pad, b[2] - b[0] + 2 * pad, b[3] - b[1] + 2 * pad]);
  }

  document.querySelectorAll(".panel input[data-layer]").forEach(function (box) {
    box.addEventListener("change", function () {
      setLayer(document.getElementById("scene-" + box.closest(".panel").dataset.scene), box.dataset.layer, box.checked);
    });
  });
  document.querySelectorAll(".panel li.item[data-box]").forEach(function (item) {
    item.addEventListener("click", function () {
      document.querySelectorAll("li.item.chosen").forEach(function (c) { c.classList.remove("chosen"); });
      item.classList.add("chosen");
      zoomTo(document.getElementById("scene-" + item.closest(".panel").dataset.scene), item.dataset.box);
    });
  });
  var select = document.getElementById("scene");
  if (select) select.addEventListener("change", function () { showScene(select.value); });

  scenes().forEach(function (svg) {
    var drag = null;
    svg.addEventListener("wheel", function (e) {
      e.preventDefault();
      var v = view(svg), r = svg.getBoundingClientRect(), px = pixel(svg);
      var cx = v[0] + v[2] / 2 + (e.clientX - r.left - r.width / 2) * px;
      var cy = v[1] + v[3] / 2 + (e.clientY - r.top - r.height / 2) * px;
      var k = Math.pow(1.0015, e.deltaY);
      setView(svg, [cx - (cx - v[0]) * k, cy - (cy - v[1]) * k, v[2] * k, v[3] * k]);
    }, { passive: false });
    svg.addEventListener("pointerdown", function (e) { drag = { x: e.clientX, y: e.clientY, v: view(svg) }; svg.setPointerCapture(e.pointerId); });
    svg.addEventListener("pointermove", function (e) {
      if (!drag) return;
      var px = pixel(svg), v = drag.v;
      svg.setAttribute("viewBox", [v[0] - (e.clientX - drag.x) * px, v[1] - (e.clientY - drag.y) * px, v[2], v[3]].join(" "));
    });
    svg.addEventListener("pointerup", function () { if (drag) { drag = null; refresh(svg); } });
    svg.addEventListener("dblclick", function () { setView(svg, svg.dataset.home.split(" ").map(Number)); });
    svg.querySelectorAll("g.finding").forEach(function (g) {
      g.addEventListener("click", function () {
        var item = document.querySelector('.panel[data-scene="' + svg.dataset.scene + '"] li[data-finding="' + g.dataset.finding + '"]');
        if (item) item.click();
      });
    });
  });

  // #scene=N&hide=KEY,KEY&show=KEY&finding=K: the same state as the controls (links, tests).
  var state = {};
  location.hash.replace(/^#/, "").split("&").forEach(function (kv) {
    var p = kv.split("="); if (p[0]) state[p[0]] = decodeURIComponent(p[1] || "");
  });
  showScene(state.scene || 0);
  var svg = current();
  if (svg) {
    (state.hide || "").split(",").filter(Boolean).forEach(function (k) { setLayer(svg, k, false); });
    (state.show || "").split(",").filter(Boolean).forEach(function (k) { setLayer(svg, k, true); });
    if (state.finding) {
      var item = document.querySelector('.panel[data-scene="' + svg.dataset.scene + '"] li[data-finding="' + state.finding + '"]');
      if (item) item.click();
    }
    refresh(svg);
  }
})();
