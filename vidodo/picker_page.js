"use strict";
// vidodo corner picker: all state lives in this page; nothing is loaded or sent.
(function () {
  const D = JSON.parse(document.getElementById("picker-data").textContent);
  const F = D.field;
  const canvas = document.getElementById("view");
  const ctx = canvas.getContext("2d");
  const $ = (id) => document.getElementById(id);
  const SNAP_CSS_PX = 14;
  // smallest ratio of the points' two principal spreads: two floor fiducials far apart
  // (four precise corners each) still fix the plane, as in the registration itself
  const MIN_SPREAD = 0.02;
  const images = D.frames.map((fr) => { const im = new Image(); im.src = fr.src; return im; });
  const points = D.frames.map(() => []);  // {u, v, snapped, x_m, y_m, src: user|auto|fiducial|null}
  const history = [];
  let fi = 0;
  let view = { s: 1, ox: 0, oy: 0 };  // canvas = (image + 0.5) * s + o  (OpenCV pixel centres)
  let cross = null;
  let selected = -1;
  let implied = null;  // floor (tiles) -> image homography of the current points

  // ------------------------------------------------------------------ linear algebra
  function jacobiEigen(a, n) {  // symmetric n x n (flat array): eigenvalues, eigenvectors
    const v = new Float64Array(n * n);
    for (let i = 0; i < n; i++) v[i * n + i] = 1;
    a = Float64Array.from(a);
    for (let sweep = 0; sweep < 100; sweep++) {
      let off = 0;
      for (let p = 0; p < n; p++) for (let q = p + 1; q < n; q++) off += a[p * n + q] ** 2;
      if (off < 1e-22) break;
      for (let p = 0; p < n; p++) {
        for (let q = p + 1; q < n; q++) {
          const apq = a[p * n + q];
          if (Math.abs(apq) < 1e-300) continue;
          const theta = (a[q * n + q] - a[p * n + p]) / (2 * apq);
          const t = Math.sign(theta || 1) / (Math.abs(theta) + Math.sqrt(theta * theta + 1));
          const c = 1 / Math.sqrt(t * t + 1), s = t * c;
          for (let k = 0; k < n; k++) {
            const akp = a[k * n + p], akq = a[k * n + q];
            a[k * n + p] = c * akp - s * akq; a[k * n + q] = s * akp + c * akq;
          }
          for (let k = 0; k < n; k++) {
            const apk = a[p * n + k], aqk = a[q * n + k];
            a[p * n + k] = c * apk - s * aqk; a[q * n + k] = s * apk + c * aqk;
          }
          for (let k = 0; k < n; k++) {
            const vkp = v[k * n + p], vkq = v[k * n + q];
            v[k * n + p] = c * vkp - s * vkq; v[k * n + q] = s * vkp + c * vkq;
          }
        }
      }
    }
    const vals = []; for (let i = 0; i < n; i++) vals.push(a[i * n + i]);
    return { vals, vecs: v };
  }

  function normaliser(p) {  // Hartley: centroid to 0, mean distance sqrt(2)
    let mx = 0, my = 0;
    p.forEach((q) => { mx += q[0]; my += q[1]; });
    mx /= p.length; my /= p.length;
    let d = 0; p.forEach((q) => { d += Math.hypot(q[0] - mx, q[1] - my); });
    const s = Math.SQRT2 / Math.max(d / p.length, 1e-12);
    return [s, 0, -s * mx, 0, s, -s * my, 0, 0, 1];
  }
  function mul3(a, b) {
    const r = new Array(9).fill(0);
    for (let i = 0; i < 3; i++) for (let j = 0; j < 3; j++) for (let k = 0; k < 3; k++)
      r[i * 3 + j] += a[i * 3 + k] * b[k * 3 + j];
    return r;
  }
  function inv3(m) {
    const [a, b, c, d, e, f, g, h, i] = m;
    const A = e * i - f * h, B = -(d * i - f * g), C = d * h - e * g;
    const det = a * A + b * B + c * C;
    if (Math.abs(det) < 1e-300) return null;
    return [A / det, -(b * i - c * h) / det, (b * f - c * e) / det,
      B / det, (a * i - c * g) / det, -(a * f - c * d) / det,
      C / det, -(a * h - b * g) / det, (a * e - b * d) / det];
  }
  function apply(H, x, y) {
    const w = H[6] * x + H[7] * y + H[8];
    return [(H[0] * x + H[1] * y + H[2]) / w, (H[3] * x + H[4] * y + H[5]) / w];
  }
  // Homography src -> dst by the normalised direct linear transform (Hartley & Zisserman,
  // Multiple View Geometry, 2nd ed., algorithm 4.2). null when the points are degenerate.
  function homography(src, dst) {
    if (src.length < 4) return null;
    const T1 = normaliser(src), T2 = normaliser(dst);
    const ata = new Float64Array(81);
    for (let k = 0; k < src.length; k++) {
      const [x, y] = apply(T1, src[k][0], src[k][1]);
      const [u, v] = apply(T2, dst[k][0], dst[k][1]);
      const rows = [[-x, -y, -1, 0, 0, 0, u * x, u * y, u], [0, 0, 0, -x, -y, -1, v * x, v * y, v]];
      rows.forEach((r) => {
        for (let i = 0; i < 9; i++) for (let j = 0; j < 9; j++) ata[i * 9 + j] += r[i] * r[j];
      });
    }
    const { vals, vecs } = jacobiEigen(ata, 9);
    const order = vals.map((v, i) => [v, i]).sort((a, b) => a[0] - b[0]);
    if (order[1][0] < 1e-9 * Math.max(order[8][0], 1e-300)) return null;  // rank < 8
    const k = order[0][1];
    const h = []; for (let i = 0; i < 9; i++) h.push(vecs[i * 9 + k]);
    const T2i = inv3(T2);
    if (!T2i) return null;
    const H = mul3(T2i, mul3(h, T1));
    return H.map((x) => x / (H[8] || 1));
  }
  function spread(p) {  // ratio of the smaller to the larger principal spread
    let mx = 0, my = 0; p.forEach((q) => { mx += q[0]; my += q[1]; });
    mx /= p.length; my /= p.length;
    let sxx = 0, syy = 0, sxy = 0;
    p.forEach((q) => { const dx = q[0] - mx, dy = q[1] - my; sxx += dx * dx; syy += dy * dy; sxy += dx * dy; });
    const tr = sxx + syy, det = sxx * syy - sxy * sxy;
    const l1 = tr / 2 + Math.sqrt(Math.max(tr * tr / 4 - det, 0)), l2 = tr - l1;
    return l1 > 0 ? Math.sqrt(Math.max(l2, 0) / l1) : 0;
  }

  // ------------------------------------------------------------------------ lattice
  const hasFloor = (p) => p.x_m !== null && p.y_m !== null;
  function relattice() {
    const pts = points[fi];
    const anchors = pts.filter((p) => hasFloor(p) && (p.src === "user" || p.src === "fiducial"));
    pts.forEach((p) => { if (p.src === "auto") { p.x_m = null; p.y_m = null; p.src = null; } });
    if (anchors.length >= 4 && spread(anchors.map((p) => [p.u, p.v])) > MIN_SPREAD) {
      const H = homography(anchors.map((p) => [p.u, p.v]),
        anchors.map((p) => [p.x_m / F.tile_m, p.y_m / F.tile_m]));
      if (H) {
        pts.forEach((p) => {
          if (hasFloor(p)) return;
          const [x, y] = apply(H, p.u, p.v);
          const rx = Math.round(x), ry = Math.round(y);
          if (Math.abs(x - rx) < 0.3 && Math.abs(y - ry) < 0.3) {
            p.x_m = rx * F.tile_m; p.y_m = ry * F.tile_m; p.src = "auto";
          }
        });
      }
    }
    const withFloor = pts.filter(hasFloor);
    implied = null;
    if (withFloor.length >= 4 && spread(withFloor.map((p) => [p.x_m, p.y_m])) > MIN_SPREAD) {
      implied = homography(withFloor.map((p) => [p.x_m / F.tile_m, p.y_m / F.tile_m]),
        withFloor.map((p) => [p.u, p.v]));
    }
  }

  // ----------------------------------------------------------------------- drawing
  const frame = () => D.frames[fi];
  function toCanvas(u, v) { return [(u + 0.5) * view.s + view.ox, (v + 0.5) * view.s + view.oy]; }
  function toImage(x, y) { return [(x - view.ox) / view.s - 0.5, (y - view.oy) / view.s - 0.5]; }
  function cssScale() { return canvas.width / canvas.getBoundingClientRect().width; }
  function eventCanvas(ev) {
    const r = canvas.getBoundingClientRect(), k = cssScale();
    return [(ev.clientX - r.left) * k, (ev.clientY - r.top) * k];
  }
  function fit() {
    const fr = frame();
    const wide = canvas.parentElement.getBoundingClientRect().width;
    const tall = Math.max(240, window.innerHeight - 170);
    const cw = Math.max(320, Math.floor(Math.min(wide, tall * fr.w / fr.h)));
    canvas.width = cw; canvas.height = Math.round(cw * fr.h / fr.w);
    canvas.style.width = cw + "px";
    view = { s: cw / fr.w, ox: 0, oy: 0 };
    draw();
  }
  function zoomAt(x, y, factor) {
    const s = Math.min(Math.max(view.s * factor, 0.05), 64);
    const [u, v] = toImage(x, y);
    view.s = s; view.ox = x - (u + 0.5) * s; view.oy = y - (v + 0.5) * s;
    draw();
  }
  function line(pts, colour, width) {
    ctx.strokeStyle = colour; ctx.lineWidth = width; ctx.beginPath();
    pts.forEach((p, i) => { const [x, y] = toCanvas(p[0], p[1]); if (i) ctx.lineTo(x, y); else ctx.moveTo(x, y); });
    ctx.stroke();
  }
  function drawGrid() {
    if (!implied || !$("chk-grid").checked) return;
    const seg = (a, b) => {
      const out = [];
      for (let k = 0; k <= 24; k++) {
        const t = k / 24, q = apply(implied, a[0] + t * (b[0] - a[0]), a[1] + t * (b[1] - a[1]));
        if (!isFinite(q[0]) || !isFinite(q[1])) return;
        out.push(q);
      }
      return out;
    };
    for (let i = 0; i <= F.tiles_x; i++) {
      const p = seg([i, 0], [i, F.tiles_y]);
      if (p) line(p, "rgba(255,214,0,0.85)", i === 0 || i === F.tiles_x ? 2.5 : 1.2);
    }
    for (let j = 0; j <= F.tiles_y; j++) {
      const p = seg([0, j], [F.tiles_x, j]);
      if (p) line(p, "rgba(255,214,0,0.85)", j === 0 || j === F.tiles_y ? 2.5 : 1.2);
    }
    const o = apply(implied, 0, 0), x1 = apply(implied, 1, 0), y1 = apply(implied, 0, 1);
    line([o, x1], "#ff3030", 3); line([o, y1], "#20c020", 3);
  }
  function draw() {
    const fr = frame();
    ctx.setTransform(1, 0, 0, 1, 0, 0);
    ctx.fillStyle = "#222"; ctx.fillRect(0, 0, canvas.width, canvas.height);
    ctx.imageSmoothingEnabled = view.s < 2;
    ctx.drawImage(images[fi], view.ox, view.oy, fr.w * view.s, fr.h * view.s);
    if (view.s >= 0.9) {
      ctx.fillStyle = "rgba(0,229,255,0.8)";
      fr.cand.forEach((c) => { const [x, y] = toCanvas(c[0], c[1]); ctx.fillRect(x - 1.5, y - 1.5, 3, 3); });
    }
    drawGrid();
    ctx.font = "bold 13px system-ui,sans-serif";
    points[fi].forEach((p, i) => {
      const [x, y] = toCanvas(p.u, p.v);
      ctx.lineWidth = i === selected ? 3 : 2;
      ctx.strokeStyle = p.snapped ? "#ff2fd0" : "#ff8a00";
      ctx.beginPath(); ctx.arc(x, y, 7, 0, 2 * Math.PI); ctx.stroke();
      ctx.fillStyle = "#000"; ctx.fillText(String(i + 1), x + 9, y - 7);
      ctx.fillStyle = "#fff"; ctx.fillText(String(i + 1), x + 8, y - 8);
    });
    if (cross) {
      const [x, y] = toCanvas(cross[0], cross[1]);
      ctx.strokeStyle = "#fff"; ctx.lineWidth = 1;
      ctx.beginPath(); ctx.moveTo(x - 12, y); ctx.lineTo(x + 12, y); ctx.moveTo(x, y - 12); ctx.lineTo(x, y + 12); ctx.stroke();
    }
    status();
  }
  function status() {
    const pts = points[fi], n = pts.filter(hasFloor).length;
    let txt = `${pts.length} points, ${n} with floor positions`;
    if (implied) {
      let ss = 0, k = 0;
      pts.filter(hasFloor).forEach((p) => {
        const q = apply(implied, p.x_m / F.tile_m, p.y_m / F.tile_m);
        ss += (q[0] - p.u) ** 2 + (q[1] - p.v) ** 2; k++;
      });
      txt += `; points off the implied grid by ${Math.sqrt(ss / k).toFixed(2)} px RMS`;
    }
    $("status").textContent = txt;
  }

  // ------------------------------------------------------------------------ table
  const fmtTiles = (m) => (m === null ? "" : String(Math.round(m / F.tile_m * 1000) / 1000));
  function table() {
    const body = document.querySelector("#points tbody");
    body.textContent = "";
    points[fi].forEach((p, i) => {
      const tr = document.createElement("tr");
      if (i === selected) tr.className = "sel";
      const cells = [String(i + 1), p.u.toFixed(2), p.v.toFixed(2)];
      cells.forEach((t) => { const td = document.createElement("td"); td.textContent = t; tr.appendChild(td); });
      ["x_m", "y_m"].forEach((key) => {
        const td = document.createElement("td"), inp = document.createElement("input");
        inp.type = "text"; inp.inputMode = "decimal"; inp.value = fmtTiles(p[key]);
        inp.className = p.src === "auto" ? "auto" : "";
        inp.setAttribute("aria-label", `point ${i + 1} ${key[0]} in tiles`);
        inp.dataset.point = String(i); inp.dataset.key = key;
        inp.addEventListener("change", onEdit);
        td.appendChild(inp); tr.appendChild(td);
      });
      const td = document.createElement("td"), del = document.createElement("button");
      del.type = "button"; del.textContent = "x"; del.title = `delete point ${i + 1}`;
      del.addEventListener("click", () => { snapshot(); points[fi].splice(i, 1); selected = -1; changed(); });
      td.appendChild(del); tr.appendChild(td);
      body.appendChild(tr);
    });
  }
  function onEdit(ev) {
    const i = Number(ev.target.dataset.point), key = ev.target.dataset.key;
    const p = points[fi][i], text = ev.target.value.trim().replace(",", ".");
    snapshot();
    if (p.src === "auto") p.src = "user";
    if (text === "") { p[key] = null; if (!hasFloor(p)) p.src = null; }
    else {
      const t = Number(text);
      if (!isFinite(t)) { $("save-msg").textContent = `point ${i + 1}: "${text}" is not a number of tiles`; return; }
      p[key] = t * F.tile_m; p.src = "user";
      const other = key === "x_m" ? "y_m" : "x_m";
      if (p[other] === null) p[other] = null;
    }
    $("save-msg").textContent = "";
    changed();
  }
  function changed() { relattice(); table(); draw(); }

  // ------------------------------------------------------------------- editing
  function snapshot() { history.push({ fi, pts: JSON.stringify(points[fi]) }); }
  function undo() {
    const h = history.pop();
    if (!h) return;
    if (h.fi !== fi) selectFrame(h.fi);
    points[fi] = JSON.parse(h.pts); selected = -1; changed();
  }
  function addPoint(u, v) {
    const fr = frame(), r = SNAP_CSS_PX * cssScale() / view.s;
    let best = -1, bd = r;
    fr.cand.forEach((c, k) => { const d = Math.hypot(c[0] - u, c[1] - v); if (d < bd) { bd = d; best = k; } });
    const p = best >= 0
      ? { u: fr.cand[best][0], v: fr.cand[best][1], snapped: true }
      : { u: Math.round(u * 100) / 100, v: Math.round(v * 100) / 100, snapped: false };
    if (points[fi].some((q) => Math.hypot(q.u - p.u, q.v - p.v) < 0.5)) return;
    snapshot();
    points[fi].push(Object.assign(p, { x_m: null, y_m: null, src: null }));
    selected = points[fi].length - 1;
    changed();
  }
  function addFiducials() {
    const fids = frame().fiducials;
    if (!fids.length) { $("save-msg").textContent = "no floor fiducial of the field profile is seen in this frame"; return; }
    snapshot();
    fids.forEach((f) => f.px.forEach((q, k) => {
      if (points[fi].some((p) => Math.hypot(p.u - q[0], p.v - q[1]) < 0.5)) return;
      points[fi].push({ u: q[0], v: q[1], snapped: true, x_m: f.floor_m[k][0], y_m: f.floor_m[k][1], src: "fiducial" });
    }));
    changed();
  }
  function csvText() {
    const rows = points[fi].filter(hasFloor);
    return "u_px,v_px,x_m,y_m\n" + rows.map((p) =>
      `${p.u.toFixed(3)},${p.v.toFixed(3)},${p.x_m.toFixed(6)},${p.y_m.toFixed(6)}`).join("\n") + "\n";
  }
  function save() {
    const rows = points[fi].filter(hasFloor);
    if (rows.length < 4) { $("save-msg").textContent = `${rows.length} points have floor positions; at least 4 are needed`; return; }
    if (!implied) { $("save-msg").textContent = "the points lie nearly on one line; add points off it"; return; }
    const text = csvText();
    $("csv-out").value = text;
    const a = $("download");
    a.href = "data:text/csv;charset=utf-8," + encodeURIComponent(text);
    a.download = fi === 0 ? "points.csv" : `points-at-${frame().t_s.toFixed(2)}s.csv`;
    a.click();
    $("save-msg").textContent = `saved ${rows.length} points as ${a.download}`;
  }

  // -------------------------------------------------------------------- events
  let drag = null;
  canvas.addEventListener("mousedown", (ev) => { drag = { at: eventCanvas(ev), o: [view.ox, view.oy], moved: false }; canvas.focus(); });
  window.addEventListener("mousemove", (ev) => {
    if (!drag) return;
    const [x, y] = eventCanvas(ev);
    if (Math.hypot(x - drag.at[0], y - drag.at[1]) > 4) drag.moved = true;
    if (drag.moved) { view.ox = drag.o[0] + x - drag.at[0]; view.oy = drag.o[1] + y - drag.at[1]; draw(); }
  });
  window.addEventListener("mouseup", (ev) => {
    if (!drag) return;
    const d = drag; drag = null;
    if (!d.moved && ev.target === canvas) { const [u, v] = toImage(...eventCanvas(ev)); cross = [u, v]; addPoint(u, v); }
  });
  canvas.addEventListener("wheel", (ev) => { ev.preventDefault(); const [x, y] = eventCanvas(ev); zoomAt(x, y, Math.exp(-ev.deltaY * 0.0015)); }, { passive: false });
  canvas.addEventListener("keydown", (ev) => {
    const fr = frame();
    if (!cross) cross = [fr.w / 2, fr.h / 2];
    const step = (ev.shiftKey ? 10 : 1) / Math.max(view.s, 1e-6) * cssScale();
    const moves = { ArrowLeft: [-1, 0], ArrowRight: [1, 0], ArrowUp: [0, -1], ArrowDown: [0, 1] };
    if (moves[ev.key]) {
      const [dx, dy] = moves[ev.key];
      if (ev.ctrlKey) { view.ox -= dx * 60; view.oy -= dy * 60; }
      else cross = [cross[0] + dx * step, cross[1] + dy * step];
      draw(); ev.preventDefault(); return;
    }
    const [cx, cy] = toCanvas(cross[0], cross[1]);
    if (ev.key === "Enter" || ev.key === " ") { addPoint(cross[0], cross[1]); ev.preventDefault(); }
    else if (ev.key === "+" || ev.key === "=") zoomAt(cx, cy, 1.5);
    else if (ev.key === "-") zoomAt(cx, cy, 1 / 1.5);
    else if (ev.key === "0") fit();
    else if (ev.key === "Backspace") { undo(); ev.preventDefault(); }
    else if (ev.key === "Delete" && selected >= 0) { snapshot(); points[fi].splice(selected, 1); selected = -1; changed(); }
  });
  document.addEventListener("keydown", (ev) => {
    if ((ev.ctrlKey || ev.metaKey) && ev.key.toLowerCase() === "z" && ev.target.tagName !== "INPUT") { undo(); ev.preventDefault(); }
  });
  $("btn-undo").addEventListener("click", undo);
  $("btn-fit").addEventListener("click", fit);
  $("btn-save").addEventListener("click", save);
  $("btn-fiducials").addEventListener("click", addFiducials);
  $("chk-grid").addEventListener("change", draw);
  window.addEventListener("resize", fit);

  function selectFrame(k) {
    fi = k; selected = -1; $("frame-select").value = String(k);
    const note = D.frames.length > 1
      ? "The camera moves in this clip: --points registers the first frame of the video, so pick in frame 1 unless you cut the video to start at the frame you pick in."
      : "";
    $("frame-note").textContent = note;
    relattice(); table();
    if (images[k].complete) fit(); else images[k].onload = fit;
  }
  D.frames.forEach((fr, k) => {
    const o = document.createElement("option");
    o.value = String(k); o.textContent = `${k + 1}: t = ${fr.t_s.toFixed(2)} s`;
    $("frame-select").appendChild(o);
  });
  $("frame-select").addEventListener("change", (ev) => selectFrame(Number(ev.target.value)));
  $("title").textContent = D.title;
  $("tile-size").textContent = F.tile_m.toFixed(4);
  $("field-size").textContent = `${F.tiles_x} x ${F.tiles_y}`;
  // for scripted use and tests: image pixel -> position in the browser window
  window.vidodoPicker = {
    clientOf(u, v) {
      const r = canvas.getBoundingClientRect(), k = cssScale(), [x, y] = toCanvas(u, v);
      return [r.left + x / k, r.top + y / k];
    },
    points: () => JSON.parse(JSON.stringify(points[fi])),
    csv: csvText,
    ready: () => images[fi].complete && images[fi].naturalWidth > 0,
  };
  selectFrame(0);
})();
