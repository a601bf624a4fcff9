/* groupsrc map browser: plain JavaScript, no library, no network.
   Reads the JSON in #mb-data (see groupsrc/outputs/browser.py), draws the chosen
   contrast's statistic at the chosen sample -- three slices through a cursor on a
   volume, a rotatable view of each hemisphere on a surface -- with the points of
   reported clusters in full colour and the rest faded.  Rows of the cluster tables
   (tr[data-cluster] inside an element with data-contrast) move the view to the
   cluster's peak. */
(function () {
  "use strict";
  var el = document.getElementById("mb-data");
  if (!el) { return; }
  var D = JSON.parse(el.textContent);
  var G = D.geometry, S = D.n_sources, NT = D.times.length;
  // ColorBrewer RdBu, reversed (blue negative, near white at zero, red positive)
  var LUT = [[5, 48, 97], [33, 102, 172], [67, 147, 195], [146, 197, 222], [209, 229, 240],
             [247, 247, 247], [253, 219, 199], [244, 165, 130], [214, 96, 77], [178, 24, 43],
             [103, 0, 31]];
  var GREY = [205, 205, 205], BACK = [255, 255, 255];

  function decode(b64, Type) {
    var bin = atob(b64), n = bin.length, buf = new ArrayBuffer(n), u = new Uint8Array(buf);
    for (var i = 0; i < n; i++) { u[i] = bin.charCodeAt(i); }
    return new Type(buf);
  }
  function colour(v) {              // v in [-1, 1]
    var x = (Math.max(-1, Math.min(1, v)) + 1) / 2 * (LUT.length - 1);
    var i = Math.min(LUT.length - 2, Math.floor(x)), f = x - i, a = LUT[i], b = LUT[i + 1];
    return [a[0] + (b[0] - a[0]) * f, a[1] + (b[1] - a[1]) * f, a[2] + (b[2] - a[2]) * f];
  }
  function mix(a, b, w) { return [a[0] * (1 - w) + b[0] * w, a[1] * (1 - w) + b[1] * w,
                                 a[2] * (1 - w) + b[2] * w]; }

  var cache = {};
  function maps(c) {
    if (!cache[c]) {
      cache[c] = {stat: decode(D.contrasts[c].stat, Int8Array),
                  ids: decode(D.contrasts[c].ids, Int8Array)};
    }
    return cache[c];
  }
  var state = {c: 0, t: 0, cursor: 0, az: {}};
  var first = D.contrasts[0].clusters[0];
  if (first) { state.t = first.t; state.cursor = first.source; }

  // the colour of source s now: full colour in a reported cluster, faded elsewhere
  function sourceColour(s) {
    var m = maps(state.c), k = state.t * S + s, v = m.stat[k] / 127;
    if (D.contrasts[state.c].kind === "F") { v = Math.abs(v); }
    if (m.ids[k] > 0) { return colour(v); }
    return mix(GREY, colour(v), 0.35 * Math.min(1, Math.abs(v) * 2));
  }

  var select = document.getElementById("mb-contrast");
  var slider = document.getElementById("mb-time");
  var timeText = document.getElementById("mb-time-text");
  var where = document.getElementById("mb-where");
  var views = document.getElementById("mb-views");
  slider.max = String(NT - 1);

  // ---------------------------------------------------------------- volume
  var vol = null;
  if (G.kind === "volume") {
    var shape = G.shape, ijk = decode(G.ijk, Int16Array);
    var index = new Int32Array(shape[0] * shape[1] * shape[2]).fill(-1);
    for (var s = 0; s < S; s++) {
      index[(ijk[3 * s] * shape[1] + ijk[3 * s + 1]) * shape[2] + ijk[3 * s + 2]] = s;
    }
    var A = G.affine;
    var ends = [["L", "R"], ["P", "A"], ["I", "S"]];
    var specs = [["sagittal", 0, 1, 2], ["coronal", 1, 0, 2], ["axial", 2, 0, 1]];
    var big = Math.max(shape[0], shape[1], shape[2]);
    var scale = Math.max(2, Math.floor(230 / big));
    vol = specs.map(function (sp) {
      var box = document.createElement("figure");
      var cv = document.createElement("canvas");
      cv.width = shape[sp[2]] * scale; cv.height = shape[sp[3]] * scale;
      cv.className = "mb-canvas"; cv.title = "click to move the slices here";
      var cap = document.createElement("figcaption");
      var flipH = A[sp[2]][sp[2]] < 0, flipV = A[sp[3]][sp[3]] < 0;
      cap.textContent = sp[0] + ": " + ends[sp[2]][0] + " \u2190 \u2192 " + ends[sp[2]][1] +
        ", " + ends[sp[3]][0] + " \u2193 \u2191 " + ends[sp[3]][1];
      box.appendChild(cv); box.appendChild(cap); views.appendChild(box);
      var v = {name: sp[0], fixed: sp[1], h: sp[2], v: sp[3], canvas: cv, flipH: flipH,
               flipV: flipV};
      cv.addEventListener("click", function (ev) {
        var r = cv.getBoundingClientRect();
        var a = Math.floor((ev.clientX - r.left) / r.width * shape[v.h]);
        var b = Math.floor((1 - (ev.clientY - r.top) / r.height) * shape[v.v]);
        if (v.flipH) { a = shape[v.h] - 1 - a; }
        if (v.flipV) { b = shape[v.v] - 1 - b; }
        var vox = [ijk[3 * state.cursor], ijk[3 * state.cursor + 1], ijk[3 * state.cursor + 2]];
        vox[v.h] = a; vox[v.v] = b;
        var s2 = index[(vox[0] * shape[1] + vox[1]) * shape[2] + vox[2]];
        if (s2 >= 0) { state.cursor = s2; draw(); }
      });
      return v;
    });
  }
  function drawVolume() {
    var cur = [ijk[3 * state.cursor], ijk[3 * state.cursor + 1], ijk[3 * state.cursor + 2]];
    vol.forEach(function (v) {
      var W = shape[v.h], H = shape[v.v], ctx = v.canvas.getContext("2d");
      var img = ctx.createImageData(W * scale, H * scale), d = img.data;
      for (var a = 0; a < W; a++) {
        for (var b = 0; b < H; b++) {
          var vox = cur.slice(); vox[v.h] = a; vox[v.v] = b;
          var s = index[(vox[0] * shape[1] + vox[1]) * shape[2] + vox[2]];
          var c = s < 0 ? BACK : sourceColour(s);
          var px = v.flipH ? W - 1 - a : a, py = v.flipV ? b : H - 1 - b;
          for (var y = py * scale; y < (py + 1) * scale; y++) {
            for (var x = px * scale; x < (px + 1) * scale; x++) {
              var o = 4 * (y * W * scale + x);
              d[o] = c[0]; d[o + 1] = c[1]; d[o + 2] = c[2]; d[o + 3] = 255;
            }
          }
        }
      }
      ctx.putImageData(img, 0, 0);
      var cx = ((v.flipH ? W - 1 - cur[v.h] : cur[v.h]) + 0.5) * scale;
      var cy = ((v.flipV ? cur[v.v] : H - 1 - cur[v.v]) + 0.5) * scale;
      ctx.strokeStyle = "rgba(0,0,0,0.55)"; ctx.lineWidth = 1;
      ctx.beginPath(); ctx.moveTo(cx, 0); ctx.lineTo(cx, H * scale);
      ctx.moveTo(0, cy); ctx.lineTo(W * scale, cy); ctx.stroke();
    });
    var A = G.affine, p = [0, 1, 2].map(function (r) {
      return A[r][0] * cur[0] + A[r][1] * cur[1] + A[r][2] * cur[2] + A[r][3];
    });
    return "(" + p.map(function (x) { return x.toFixed(1); }).join(", ") + ") mm";
  }

  // ---------------------------------------------------------------- surface
  var surf = null;
  if (G.kind === "surface") {
    surf = G.hemis.map(function (h) {
      var verts = decode(h.vertices, Float32Array), tris = decode(h.triangles, Int32Array);
      var src = decode(h.sources, Int32Array), vs = new Int32Array(h.n_vertices).fill(-1);
      for (var i = 0; i < src.length; i++) { vs[src[i]] = h.first + i; }
      var cx = 0, cy = 0, cz = 0, n = h.n_vertices;
      for (var j = 0; j < n; j++) { cx += verts[3 * j]; cy += verts[3 * j + 1]; cz += verts[3 * j + 2]; }
      var box = document.createElement("figure"), cv = document.createElement("canvas");
      cv.width = 340; cv.height = 260; cv.className = "mb-canvas";
      cv.title = "drag to rotate; click to read a point";
      var cap = document.createElement("figcaption");
      box.appendChild(cv); box.appendChild(cap); views.appendChild(box);
      var hs = {name: h.name, verts: verts, tris: tris, vs: vs, canvas: cv, cap: cap,
                centre: [cx / n, cy / n, cz / n], screen: null};
      state.az[h.name] = h.name === "left" ? 180 : 0;        // lateral views first
      var drag = null;
      cv.addEventListener("mousedown", function (ev) { drag = {x: ev.clientX, moved: false}; });
      window.addEventListener("mouseup", function (ev) {
        if (drag && !drag.moved) { pick(hs, ev); }
        drag = null;
      });
      cv.addEventListener("mousemove", function (ev) {
        if (!drag) { return; }
        var dx = ev.clientX - drag.x;
        if (Math.abs(dx) > 2) {
          drag.moved = true; drag.x = ev.clientX;
          state.az[h.name] = (state.az[h.name] + dx) % 360; draw();
        }
      });
      return hs;
    });
  }
  function camera(az) {
    var r = az * Math.PI / 180;
    var d = [Math.cos(r), Math.sin(r), 0];                  // from the object to the viewer
    return {d: d, right: [-Math.sin(r), Math.cos(r), 0], up: [0, 0, 1]};
  }
  function drawHemisphere(hs) {
    var cam = camera(state.az[hs.name]), v = hs.verts, t = hs.tris, nt = t.length / 3;
    var nv = v.length / 3, px = new Float32Array(2 * nv), dep = new Float32Array(nv);
    var lo = [1e9, 1e9], hi = [-1e9, -1e9];
    for (var i = 0; i < nv; i++) {
      var x = v[3 * i] - hs.centre[0], y = v[3 * i + 1] - hs.centre[1], z = v[3 * i + 2] - hs.centre[2];
      px[2 * i] = x * cam.right[0] + y * cam.right[1];
      px[2 * i + 1] = z;
      dep[i] = x * cam.d[0] + y * cam.d[1];
      lo[0] = Math.min(lo[0], px[2 * i]); hi[0] = Math.max(hi[0], px[2 * i]);
      lo[1] = Math.min(lo[1], z); hi[1] = Math.max(hi[1], z);
    }
    var cv = hs.canvas, ctx = cv.getContext("2d");
    var k = 0.92 * Math.min(cv.width / (hi[0] - lo[0]), cv.height / (hi[1] - lo[1]));
    var ox = cv.width / 2 - k * (lo[0] + hi[0]) / 2, oy = cv.height / 2 + k * (lo[1] + hi[1]) / 2;
    var cols = new Array(nv);
    for (var j = 0; j < nv; j++) { cols[j] = hs.vs[j] >= 0 ? sourceColour(hs.vs[j]) : [140, 140, 140]; }
    var keep = [], depth = [], shade = [];
    var L = [cam.d[0] * 0.8, cam.d[1] * 0.8, 0.6];
    for (var f = 0; f < nt; f++) {
      var a = t[3 * f], b = t[3 * f + 1], c = t[3 * f + 2];
      var ux = v[3 * b] - v[3 * a], uy = v[3 * b + 1] - v[3 * a + 1], uz = v[3 * b + 2] - v[3 * a + 2];
      var wx = v[3 * c] - v[3 * a], wy = v[3 * c + 1] - v[3 * a + 1], wz = v[3 * c + 2] - v[3 * a + 2];
      var nx = uy * wz - uz * wy, ny = uz * wx - ux * wz, nz = ux * wy - uy * wx;
      var nn = Math.sqrt(nx * nx + ny * ny + nz * nz) || 1;
      var facing = (nx * cam.d[0] + ny * cam.d[1]) / nn;
      if (facing <= 0) { continue; }
      keep.push(f); depth.push(dep[a] + dep[b] + dep[c]);
      shade.push(0.35 + 0.65 * Math.max(0, (nx * L[0] + ny * L[1] + nz * L[2]) / nn));
    }
    var order = keep.map(function (_, i) { return i; });
    order.sort(function (p, q) { return depth[p] - depth[q]; });
    ctx.fillStyle = "#ffffff"; ctx.fillRect(0, 0, cv.width, cv.height);
    for (var o = 0; o < order.length; o++) {
      var n = order[o], f2 = keep[n], a2 = t[3 * f2], b2 = t[3 * f2 + 1], c2 = t[3 * f2 + 2];
      var s = shade[n], ca = cols[a2], cb = cols[b2], cc = cols[c2];
      var col = "rgb(" + Math.round((ca[0] + cb[0] + cc[0]) / 3 * s) + "," +
        Math.round((ca[1] + cb[1] + cc[1]) / 3 * s) + "," + Math.round((ca[2] + cb[2] + cc[2]) / 3 * s) + ")";
      ctx.fillStyle = col; ctx.strokeStyle = col; ctx.lineWidth = 0.6;
      ctx.beginPath();
      ctx.moveTo(ox + k * px[2 * a2], oy - k * px[2 * a2 + 1]);
      ctx.lineTo(ox + k * px[2 * b2], oy - k * px[2 * b2 + 1]);
      ctx.lineTo(ox + k * px[2 * c2], oy - k * px[2 * c2 + 1]);
      ctx.closePath(); ctx.fill(); ctx.stroke();
    }
    hs.screen = {px: px, dep: dep, k: k, ox: ox, oy: oy};
    var az = ((state.az[hs.name] % 360) + 360) % 360;
    hs.cap.textContent = hs.name + " hemisphere, seen from azimuth " + Math.round(az) +
      "\u00b0 (0 = from the right, 180 = from the left); drag to rotate";
    // the cursor, when it is on this hemisphere and in front
    for (var q = 0; q < hs.vs.length; q++) {
      if (hs.vs[q] === state.cursor) {
        ctx.strokeStyle = "#000"; ctx.lineWidth = 2; ctx.beginPath();
        ctx.arc(ox + k * px[2 * q], oy - k * px[2 * q + 1], 6, 0, 2 * Math.PI); ctx.stroke();
      }
    }
  }
  function pick(hs, ev) {
    if (!hs.screen) { return; }
    var r = hs.canvas.getBoundingClientRect(), sc = hs.screen;
    var x = (ev.clientX - r.left) * hs.canvas.width / r.width;
    var y = (ev.clientY - r.top) * hs.canvas.height / r.height;
    var best = -1, bestScore = 1e18;
    for (var i = 0; i < hs.vs.length; i++) {
      if (hs.vs[i] < 0) { continue; }
      var dx = sc.ox + sc.k * sc.px[2 * i] - x, dy = sc.oy - sc.k * sc.px[2 * i + 1] - y;
      var d2 = dx * dx + dy * dy;
      if (d2 < 64 && d2 - 4 * sc.dep[i] < bestScore) { best = i; bestScore = d2 - 4 * sc.dep[i]; }
    }
    if (best >= 0) { state.cursor = hs.vs[best]; draw(); }
  }
  function faceCursor() {           // rotate the cursor's hemisphere so the cursor faces us
    if (!surf) { return; }
    surf.forEach(function (hs) {
      for (var q = 0; q < hs.vs.length; q++) {
        if (hs.vs[q] === state.cursor) {
          var x = hs.verts[3 * q] - hs.centre[0], y = hs.verts[3 * q + 1] - hs.centre[1];
          state.az[hs.name] = Math.atan2(y, x) * 180 / Math.PI;
        }
      }
    });
  }

  // ---------------------------------------------------------------- both
  function draw() {
    slider.value = String(state.t);
    select.value = String(state.c);
    var label = G.kind === "volume" ? drawVolume() : (surf.forEach(drawHemisphere), "");
    var m = maps(state.c), k = state.t * S + state.cursor, con = D.contrasts[state.c];
    var id = m.ids[k], cl = null;
    con.clusters.forEach(function (c) { if (c.id === id) { cl = c.cluster; } });
    timeText.textContent = D.times[state.t].toFixed(1) + " ms";
    where.textContent = "source " + state.cursor + " " + label + ": " + con.kind + " = " +
      (m.stat[k] / 127 * con.top).toFixed(2) +
      (cl !== null ? " (reported cluster " + cl + ")" : " (no reported cluster)");
    document.getElementById("mb").setAttribute("data-state",
      [state.c, state.t, state.cursor].join(","));
  }
  function go(contrast, cluster) {
    D.contrasts.forEach(function (c, i) {
      if (c.name !== contrast) { return; }
      c.clusters.forEach(function (r) {
        if (String(r.cluster) !== String(cluster)) { return; }
        state.c = i; state.t = r.t; state.cursor = r.source; faceCursor(); draw();
        document.getElementById("browser").scrollIntoView();
      });
    });
  }
  select.addEventListener("change", function () { state.c = Number(select.value); draw(); });
  slider.addEventListener("input", function () { state.t = Number(slider.value); draw(); });
  function known(contrast, cluster) {
    return D.contrasts.some(function (c) {
      return c.name === contrast && c.clusters.some(function (r) {
        return String(r.cluster) === String(cluster);
      });
    });
  }
  document.querySelectorAll("tr[data-cluster]").forEach(function (row) {
    var owner = row.closest("[data-contrast]");
    if (!owner || !known(owner.getAttribute("data-contrast"), row.getAttribute("data-cluster"))) {
      return;
    }
    row.classList.add("mb-link");
    row.title = "show this cluster in the map browser";
    row.addEventListener("click", function () {
      go(owner.getAttribute("data-contrast"), row.getAttribute("data-cluster"));
    });
  });
  faceCursor();
  draw();
}());
