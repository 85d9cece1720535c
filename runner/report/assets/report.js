// weir's morning page: the window list under each job's history, tooltips, the axis labels,
// and the arcs of the dependency drawing. The data comes from the JSON block #weir-data.
(function () {
  "use strict";
  var D = JSON.parse(document.getElementById("weir-data").textContent);
  var tip = document.getElementById("tip");
  var decoded = {};
  var AROUND = 12; // windows listed on either side of the one clicked

  function pad(n, w) { n = String(Math.abs(n)); while (n.length < (w || 2)) { n = "0" + n; } return n; }
  function isoLocal(sec, offMin) {
    var t = new Date((sec + offMin * 60) * 1000);
    var s = t.getUTCFullYear() + "-" + pad(t.getUTCMonth() + 1) + "-" + pad(t.getUTCDate()) + "T" +
      pad(t.getUTCHours()) + ":" + pad(t.getUTCMinutes());
    if (t.getUTCSeconds()) { s += ":" + pad(t.getUTCSeconds()); }
    return s + (offMin < 0 ? "-" : "+") + pad(Math.floor(Math.abs(offMin) / 60)) + ":" + pad(Math.abs(offMin) % 60);
  }
  function utcText(sec) {
    var t = new Date(sec * 1000);
    return t.getUTCFullYear() + "-" + pad(t.getUTCMonth() + 1) + "-" + pad(t.getUTCDate()) + " " +
      pad(t.getUTCHours()) + ":" + pad(t.getUTCMinutes()) + " UTC";
  }
  function words(s) {
    s = Math.abs(s);
    if (s < 60) { return Math.round(s) + " s"; }
    if (s < 3600) { return Math.floor(s / 60) + " min"; }
    if (s < 86400) { return Math.floor(s / 3600) + " h " + Math.floor((s % 3600) / 60) + " min"; }
    return Math.floor(s / 86400) + " d " + Math.floor((s % 86400) / 3600) + " h";
  }
  function ago(sec) {
    var s = D.at - sec;
    return s < 0 ? words(s) + " after the clock" : words(s) + " before the clock";
  }
  function num(n) { return n === null || n === undefined ? "" : n.toLocaleString("en-US"); }

  var B64 = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/", DIGIT = {};
  for (var b = 0; b < 64; b++) { DIGIT[B64.charAt(b)] = b; }
  function vlq(text) {
    var out = [], i = 0, n = (text || "").length;
    while (i < n) {
      var val = 0, scale = 1, c;
      do { c = DIGIT[text.charAt(i++)]; val += (c % 32) * scale; scale *= 32; } while (c >= 32 && i < n);
      out.push(val === 1 ? null : (val % 2 ? -(val - 1) / 2 : val / 2));
    }
    return out;
  }
  function unrun(pairs, n) {
    var out = new Array(n), i = 0;
    (pairs || []).forEach(function (p) { for (var r = 0; r < p[1]; r++) { out[i++] = p[0]; } });
    return out;
  }

  function decode(j) {
    if (decoded[j]) { return decoded[j]; }
    var w = D.jobs[j].w, n = w.n || 0, start = new Array(n), fin = new Array(n), extra = {};
    var steps = unrun(w.step, Math.max(n - 1, 0)), t = w.t0, i;
    for (i = 0; i < n; i++) { start[i] = t; if (i < n - 1) { t += steps[i]; } }
    var deltas = vlq(w.fin), last = 0;
    for (i = 0; i < n; i++) {
      if (deltas[i] === null) { fin[i] = null; } else { last += deltas[i]; fin[i] = last; }
    }
    (w.x || []).forEach(function (e) { extra[e[0]] = e; });
    decoded[j] = {n: n, start: start, len: unrun(w.len, n), off: unrun(w.off, n), fin: fin, cs: vlq(w.cs),
      rw: vlq(w.rw), s: w.s || "", extra: extra};
    return decoded[j];
  }
  function stateOf(x, i) {
    var code = x.s.charAt(i);
    return {state: D.codes[code.toLowerCase()], late: code !== code.toLowerCase()};
  }
  // the index of the window holding time t (seconds), or the nearest one
  function indexAt(x, t) {
    var lo = 0, hi = x.n - 1;
    if (x.n === 0) { return -1; }
    while (lo < hi) {
      var mid = (lo + hi + 1) >> 1;
      if (x.start[mid] <= t) { lo = mid; } else { hi = mid - 1; }
    }
    return lo;
  }
  function jobIndex(name) {
    for (var k = 0; k < D.jobs.length; k++) { if (D.jobs[k].name === name) { return k; } }
    return -1;
  }
  function el(tag, text, cls) {
    var e = document.createElement(tag);
    if (text !== undefined && text !== null) { e.textContent = text; }
    if (cls) { e.className = cls; }
    return e;
  }

  function list(j, t) {
    var x = decode(j), box = document.getElementById("wl-" + j);
    if (!box) { return 0; }
    box.textContent = "";
    var i = indexAt(x, t);
    if (i < 0) { box.appendChild(el("p", "No windows of this job are listed here.", "muted")); return 0; }
    var first = Math.max(0, i - AROUND), last = Math.min(x.n - 1, i + AROUND);
    var job = D.jobs[j];
    var head = el("p", job.name + ": the " + (last - first + 1) + " windows around " + isoLocal(t, x.off[i]) +
      " (" + job.tz + "); the one holding that time is marked.");
    head.className = "sub";
    box.appendChild(head);
    var table = el("table"), thead = el("thead"), tr = el("tr");
    ["window (" + job.tz + ")", "state", "last run finished", "duration", "rows written", "reason"].forEach(
      function (h) { tr.appendChild(el("th", h)); });
    thead.appendChild(tr);
    table.appendChild(thead);
    var body = el("tbody");
    for (var k = first; k <= last; k++) {
      var st = stateOf(x, k), row = el("tr"), e = x.extra[k];
      row.className = "w-" + st.state + (k === i ? " here" : "");
      row.setAttribute("data-window", isoLocal(x.start[k], x.off[k]));
      row.appendChild(el("td", isoLocal(x.start[k], x.off[k])));
      row.appendChild(el("td", D.glyph[st.state] + " " + st.state + (st.late ? " " + D.glyph.late + " late" : "")));
      row.appendChild(el("td", x.fin[k] === null ? "never" : utcText(x.fin[k]) + " (" + ago(x.fin[k]) + ")"));
      var cs = x.cs[k];
      row.appendChild(el("td", cs === null ? "" : cs < 1 ? "< 0.01 s" : (cs / 100).toFixed(2) + " s", "num"));
      var rows = x.rw[k] === null ? "" : num(x.rw[k]), more = [];
      if (e && e[3] !== null && e[3] !== undefined) { more.push(num(e[3]) + " read"); }
      if (e && e[4]) { more.push(D.glyph.dropped + " " + num(e[4]) + " dropped"); }
      row.appendChild(el("td", rows + (more.length ? " (" + more.join(", ") + ")" : ""), "num"));
      var why = el("td", e && e[1] >= 0 ? D.strings[e[1]] : "", "reason");
      if (e && e[2] >= 0) { why.appendChild(el("div", D.strings[e[2]], "err")); }
      row.appendChild(why);
      body.appendChild(row);
    }
    table.appendChild(body);
    box.appendChild(table);
    return last - first + 1;
  }

  function timeAt(svg, ev) {
    var pt = svg.createSVGPoint();
    pt.x = ev.clientX;
    pt.y = ev.clientY;
    var p = pt.matrixTransform(svg.getScreenCTM().inverse());
    var g = Number(svg.getAttribute("data-gutter")), w = Number(svg.getAttribute("data-plot"));
    var f = (p.x - g) / w;
    if (f < 0 || f > 1) { return null; }
    return D.a0 + f * (D.a1 - D.a0);
  }

  document.querySelectorAll("svg.timeline").forEach(function (svg) {
    var j = Number(svg.getAttribute("data-job"));
    svg.addEventListener("mousemove", function (ev) {
      var t = timeAt(svg, ev);
      if (t === null) { tip.hidden = true; return; }
      var x = decode(j), i = indexAt(x, t);
      var lines = [D.jobs[j].name];
      if (i >= 0 && t >= x.start[i] && t < x.start[i] + x.len[i]) {
        var st = stateOf(x, i);
        lines.push(isoLocal(x.start[i], x.off[i]) + ": " + D.glyph[st.state] + " " + st.state +
          (st.late ? ", " + D.glyph.late + " late" : ""));
      } else { lines.push("no due window here"); }
      lines.push("click to list the windows around it");
      tip.textContent = lines.join("\n");
      tip.hidden = false;
      tip.style.left = Math.min(ev.clientX + 14, window.innerWidth - tip.offsetWidth - 8) + "px";
      tip.style.top = (ev.clientY + 16) + "px";
    });
    svg.addEventListener("mouseleave", function () { tip.hidden = true; });
    svg.addEventListener("click", function (ev) {
      var t = timeAt(svg, ev);
      if (t !== null) { list(j, t); }
    });
  });

  // axis labels under the bars: the last one ends at its tick, one that would overlap its neighbour is hidden
  function fitAxis() {
    document.querySelectorAll(".axis-labels").forEach(function (box) {
      var limit = box.getBoundingClientRect().right, prev = -Infinity;
      box.querySelectorAll(".al").forEach(function (lab) {
        lab.classList.remove("end", "hidden");
        var r = lab.getBoundingClientRect();
        if (r.right > limit) { lab.classList.add("end"); r = lab.getBoundingClientRect(); }
        if (r.left < prev + 6) { lab.classList.add("hidden"); return; }
        prev = r.right;
      });
    });
  }
  fitAxis();
  window.addEventListener("resize", fitAxis);

  // the dependency drawing: pointing at a job picks out its arcs
  var arcs = document.querySelectorAll("svg.arcs .arc");
  document.querySelectorAll("ol.deprows li").forEach(function (li) {
    var row = li.getAttribute("data-row");
    li.addEventListener("mouseenter", function () {
      li.classList.add("hl");
      arcs.forEach(function (a) {
        var on = a.getAttribute("data-from") === row || a.getAttribute("data-to") === row;
        a.classList.toggle("hl", on);
        a.classList.toggle("dim", !on);
      });
    });
    li.addEventListener("mouseleave", function () {
      li.classList.remove("hl");
      arcs.forEach(function (a) { a.classList.remove("hl", "dim"); });
    });
  });

  // a link to a job opens its history
  function openTarget() {
    var target = location.hash ? document.getElementById(location.hash.slice(1)) : null;
    if (target && target.tagName === "DETAILS") { target.open = true; }
  }
  window.addEventListener("hashchange", openTarget);
  openTarget();

  window.weirReport = {
    vlq: vlq,
    // list the windows of a job around an instant (ISO 8601 with offset), as a click there does
    listAt: function (name, iso) {
      var j = jobIndex(name);
      if (j < 0) { return -1; }
      var d = document.getElementById("job-" + j);
      if (d) { d.open = true; }
      return list(j, Date.parse(iso) / 1000);
    },
    // where on the screen a job's timeline shows an instant (scrolled into view first)
    pointFor: function (name, iso) {
      var j = jobIndex(name), svg = document.querySelector('svg.timeline[data-job="' + j + '"]');
      if (!svg) { return null; }
      svg.closest("details").open = true;
      svg.scrollIntoView({block: "center"});
      var f = (Date.parse(iso) / 1000 - D.a0) / (D.a1 - D.a0);
      var g = Number(svg.getAttribute("data-gutter")), w = Number(svg.getAttribute("data-plot"));
      var pt = svg.createSVGPoint();
      pt.x = g + f * w;
      pt.y = 30;
      var p = pt.matrixTransform(svg.getScreenCTM());
      return {x: p.x, y: p.y};
    }
  };
})();
