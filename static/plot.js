/* Stationfit network plot: pan, zoom, ellipse exaggeration and the detail panel.
   The SVG is drawn by the server (templates/partials/network_plot.html); this file only
   moves the viewBox, keeps symbols a constant size on screen and shows the figures that
   the server formatted (the JSON block #np-data, packed: see plot.script_data; the ellipse
   axes are read from the SVG).  No figure is computed here, and user
   text only ever goes through textContent. */
(function () {
  "use strict";

  var ZOOM_STEP = 1.6;
  var PAN_STEP_PX = 60;
  var DRAG_THRESHOLD_PX = 4;

  function round(value) {
    return Number(value.toPrecision(10));
  }

  function element(tag, className, text) {
    var node = document.createElement(tag);
    if (className) { node.className = className; }
    if (text !== undefined && text !== null) { node.textContent = text; }
    return node;
  }

  function facts(rows) {
    var list = element("dl", "np-facts");
    rows.forEach(function (row) {
      list.appendChild(element("dt", "", row[0]));
      list.appendChild(element("dd", "", row[1]));
    });
    return list;
  }

  /* (label, value) rows from the data block's packing: [index of the labels, values]. */
  function unpack(labelSets, packed) {
    var labels = labelSets[packed[0]];
    return packed[1].map(function (value, i) { return [labels[i], value]; });
  }

  /* An observation's figures from its list, named by the data block's observation_keys. */
  function named(keys, values) {
    var o = {};
    keys.forEach(function (key, i) { o[key] = values[i]; });
    o.flagged = o.status === "flagged";
    o.ignored = o.status === "ignored";
    return o;
  }

  /* The longest 1-2-5 bar length (from the server's list) not over `longest`. */
  function barIndex(lengths, longest) {
    var best = 0;
    for (var i = 0; i < lengths.length; i++) {
      if (lengths[i] <= longest * (1 + 1e-9)) { best = i; }
    }
    return best;
  }

  function start() {
    var root = document.getElementById("np");
    var source = document.getElementById("np-data");
    var svg = document.getElementById("np-map");
    if (!root || !source || !svg) { return; }
    var data = JSON.parse(source.textContent);

    var points = {};
    var lines = {};
    data.points.forEach(function (p) { points[p.id] = p; });
    data.lines.forEach(function (l) { lines[l.id] = l; });

    var toolbar = root.querySelector(".np-toolbar");
    var range = document.getElementById("np-exag");
    var output = document.getElementById("np-exag-value");
    var legendExag = root.querySelector(".np-legend-exag");
    var panel = document.getElementById("np-panel-body");
    var north = svg.querySelector(".np-north");
    var scales = svg.querySelector(".np-scales");
    var mapBack = svg.querySelector(".np-mapbar-back");
    var mapHalf = svg.querySelector(".np-mapbar-half");
    var mapLabel = document.getElementById("np-mapbar-label");
    var ellBar = document.getElementById("np-ellbar");
    var ellLabel = document.getElementById("np-ellbar-label");
    var pixelGroups = svg.querySelectorAll(".np-px");
    var ellipses = svg.querySelectorAll(".np-ell");

    var view = { x: data.view.x, y: data.view.y, w: data.view.width, h: data.view.height };
    var perPx = data.nominal.per_px;
    var fitPerPx = perPx;
    var width = 0;
    var height = 0;
    var factorIndex = data.exaggeration_index;
    var selected = [];

    toolbar.hidden = false;
    showEmpty();

    function measure() {
      var box = svg.getBoundingClientRect();
      width = box.width;
      height = box.height;
      return width > 0 && height > 0;
    }

    function factor() {
      return data.exaggerations[factorIndex];
    }

    function updateBars() {
      var lengths = data.bars.lengths;
      var i = barIndex(lengths, data.bars.map_px * perPx);
      var px = lengths[i] / perPx;
      mapBack.setAttribute("width", round(px + 1));
      mapHalf.setAttribute("width", round(px / 2));
      mapLabel.setAttribute("x", round(px + 8));
      mapLabel.setAttribute("data-length", lengths[i]);
      mapLabel.textContent = data.bars.labels[i];
      if (!ellBar) { return; }
      var f = factor();
      var j = barIndex(lengths, data.bars.ellipse_px * perPx / f);
      var epx = lengths[j] * f / perPx;
      ellBar.setAttribute("d", "M0 -7V0H" + round(epx) + "V-7");
      ellBar.setAttribute("data-length", lengths[j]);
      ellBar.setAttribute("data-px", round(epx));
      ellLabel.setAttribute("x", round(epx + 8));
      ellLabel.textContent = data.bars.labels[j] + " on the ellipses (" +
        data.exaggeration_labels[factorIndex] + ")";
    }

    function apply() {
      svg.setAttribute("viewBox", [view.x, view.y, view.w, view.h].map(round).join(" "));
      var scale = "scale(" + round(perPx) + ")";
      Array.prototype.forEach.call(pixelGroups, function (g) { g.setAttribute("transform", scale); });
      north.setAttribute("transform", "translate(" + round(view.x + view.w - 30 * perPx) + " " +
        round(view.y + 12 * perPx) + ") " + scale);
      scales.setAttribute("transform", "translate(" + round(view.x + 16 * perPx) + " " +
        round(view.y + view.h - 16 * perPx) + ") " + scale);
      updateBars();
    }

    function fit() {
      if (!measure()) { return; }
      var m = data.nominal.margin;
      var usableW = Math.max(width - m.left - m.right, 40);
      var usableH = Math.max(height - m.top - m.bottom, 40);
      var ext = data.extent;
      perPx = Math.max(ext.width / usableW, ext.height / usableH) || 1 / usableW;
      fitPerPx = perPx;
      view = {
        x: ext.width / 2 - (m.left + usableW / 2) * perPx,
        y: ext.height / 2 - (m.top + usableH / 2) * perPx,
        w: width * perPx,
        h: height * perPx
      };
      apply();
    }

    /* Zoom by `k` keeping the map point under (px, py) — screen pixels in the canvas — still. */
    function zoom(k, px, py) {
      if (!measure()) { return; }
      if (px === undefined) { px = width / 2; py = height / 2; }
      var next = Math.min(Math.max(perPx / k, fitPerPx / 5000), fitPerPx * 8);
      var mx = view.x + px * perPx;
      var my = view.y + py * perPx;
      perPx = next;
      view = { x: mx - px * perPx, y: my - py * perPx, w: width * perPx, h: height * perPx };
      apply();
    }

    function pan(dxPx, dyPx) {
      view.x -= dxPx * perPx;
      view.y -= dyPx * perPx;
      apply();
    }

    function setFactor(index) {
      factorIndex = Math.min(Math.max(index, 0), data.exaggerations.length - 1);
      var f = factor();
      Array.prototype.forEach.call(ellipses, function (e) {
        e.setAttribute("rx", round(parseFloat(e.getAttribute("data-b")) * f));
        e.setAttribute("ry", round(parseFloat(e.getAttribute("data-a")) * f));
      });
      var label = data.exaggeration_labels[factorIndex];
      if (range) {
        range.value = String(factorIndex);
        range.setAttribute("aria-valuetext", label);
      }
      if (output) { output.textContent = label; }
      if (legendExag) { legendExag.textContent = label; }
      updateBars();
    }

    // ---- selection and the detail panel ----

    function clearSelection() {
      selected.forEach(function (node) { node.classList.remove("is-selected"); });
      selected = [];
    }

    function mark(node) {
      if (node) { node.classList.add("is-selected"); selected.push(node); }
    }

    function showEmpty() {
      clearSelection();
      panel.textContent = "";
      panel.appendChild(element("p", "np-empty", "Select a point or a line on the plot to see its figures here."));
    }

    function showPoint(id) {
      var p = points[id];
      if (!p) { return; }
      clearSelection();
      mark(svg.querySelector('.np-pt[data-point="' + p.id + '"]'));
      mark(svg.querySelector('.np-ell[data-point="' + p.id + '"]'));
      panel.textContent = "";
      panel.appendChild(element("p", "np-panel-name", p.name));
      panel.appendChild(element("p", "np-panel-sub", "Point"));
      panel.appendChild(facts(unpack(data.label_sets, p.detail)));
    }

    function locate(lineNumber) {
      var row = document.querySelector('#observations-table tr[data-line="' + lineNumber + '"]');
      if (!row) { return; }
      row.scrollIntoView({ block: "center" });
      row.classList.add("np-located");
      window.setTimeout(function () { row.classList.remove("np-located"); }, 2500);
    }

    function observationItem(o) {
      var item = element("li", o.flagged ? "is-flagged" : (o.ignored ? "is-ignored" : ""));
      var head = element("div", "np-obs-head");
      head.appendChild(element("span", "", o.kind));
      var lineButton = element("button", "np-obs-line np-linklike", "line " + o.line);
      lineButton.type = "button";
      lineButton.title = "Show line " + o.line + " in the observations table";
      lineButton.addEventListener("click", function () { locate(o.line); });
      head.appendChild(lineButton);
      item.appendChild(head);
      var values = [["Marks", o.marks], ["Booked", o.booked]];
      if (o.reduction && o.reduction !== "\u2014") { values.push(["Reduction", o.reduction]); }
      item.appendChild(facts(values.concat([
        ["Used", o.observed],
        ["Residual", o.residual],
        ["w", o.w]
      ])));
      if (o.flagged) {
        item.appendChild(element("span", "flag", "\u2691 Flagged"));
      } else if (o.ignored) {
        item.appendChild(element("span", "tag", "Ignored"));
      } else if (o.status === "uncontrolled") {
        item.appendChild(element("span", "tag tag-warn", "Uncontrolled"));
      }
      return item;
    }

    function showLine(id) {
      var l = lines[id];
      if (!l) { return; }
      clearSelection();
      mark(svg.querySelector('.np-ln[data-line="' + l.id + '"]'));
      panel.textContent = "";
      panel.appendChild(element("p", "np-panel-name", l.names[0] + " \u2013 " + l.names[1]));
      var count = l.detail.length;
      panel.appendChild(element("p", "np-panel-sub",
        count + (count === 1 ? " observation" : " observations") + (l.used ? "" : ", none used")));
      var list = element("ul", "np-obs");
      l.detail.forEach(function (values) {
        list.appendChild(observationItem(named(data.observation_keys, values)));
      });
      panel.appendChild(list);
      if (l.relative) {
        panel.appendChild(element("p", "np-section", "Relative precision"));
        panel.appendChild(facts(unpack(data.label_sets, l.relative)));
      }
    }

    function activate(target) {
      var pt = target.closest(".np-pt");
      if (pt) { showPoint(pt.getAttribute("data-point")); return true; }
      var ln = target.closest(".np-ln");
      if (ln) { showLine(ln.getAttribute("data-line")); return true; }
      return false;
    }

    // ---- events ----

    var drag = null;
    var suppressClick = false;

    svg.addEventListener("pointerdown", function (event) {
      if (event.button !== 0) { return; }
      drag = { id: event.pointerId, x: event.clientX, y: event.clientY, vx: view.x, vy: view.y, moved: false };
    });
    svg.addEventListener("pointermove", function (event) {
      if (!drag || event.pointerId !== drag.id) { return; }
      var dx = event.clientX - drag.x;
      var dy = event.clientY - drag.y;
      if (!drag.moved) {
        if (Math.abs(dx) + Math.abs(dy) < DRAG_THRESHOLD_PX) { return; }
        drag.moved = true;
        svg.setPointerCapture(event.pointerId);
        svg.classList.add("is-panning");
      }
      view.x = drag.vx - dx * perPx;
      view.y = drag.vy - dy * perPx;
      apply();
    });
    function endDrag(event) {
      if (!drag || event.pointerId !== drag.id) { return; }
      if (drag.moved) {
        suppressClick = true;
        window.setTimeout(function () { suppressClick = false; }, 0);
      }
      svg.classList.remove("is-panning");
      drag = null;
    }
    svg.addEventListener("pointerup", endDrag);
    svg.addEventListener("pointercancel", endDrag);

    svg.addEventListener("click", function (event) {
      if (suppressClick) { suppressClick = false; return; }
      activate(event.target);
    });

    svg.addEventListener("wheel", function (event) {
      event.preventDefault();
      var box = svg.getBoundingClientRect();
      var delta = event.deltaY * (event.deltaMode === 1 ? 16 : (event.deltaMode === 2 ? 400 : 1));
      zoom(Math.exp(-delta * 0.0015), event.clientX - box.left, event.clientY - box.top);
    }, { passive: false });

    svg.addEventListener("keydown", function (event) {
      var key = event.key;
      if (key === "Enter" || key === " ") {
        if (activate(event.target)) { event.preventDefault(); }
      } else if (key === "Escape") {
        showEmpty();
      } else if (key === "+" || key === "=") {
        zoom(ZOOM_STEP); event.preventDefault();
      } else if (key === "-" || key === "_") {
        zoom(1 / ZOOM_STEP); event.preventDefault();
      } else if (key === "ArrowLeft") {
        pan(PAN_STEP_PX, 0); event.preventDefault();
      } else if (key === "ArrowRight") {
        pan(-PAN_STEP_PX, 0); event.preventDefault();
      } else if (key === "ArrowUp") {
        pan(0, PAN_STEP_PX); event.preventDefault();
      } else if (key === "ArrowDown") {
        pan(0, -PAN_STEP_PX); event.preventDefault();
      }
    });

    root.addEventListener("click", function (event) {
      var button = event.target.closest("[data-np-action]");
      if (!button) { return; }
      var action = button.getAttribute("data-np-action");
      if (action === "zoom-in") { zoom(ZOOM_STEP); }
      else if (action === "zoom-out") { zoom(1 / ZOOM_STEP); }
      else if (action === "fit") { fit(); }
      else if (action === "exag-up") { setFactor(factorIndex + 1); }
      else if (action === "exag-down") { setFactor(factorIndex - 1); }
    });

    if (range) {
      range.addEventListener("input", function () { setFactor(parseInt(range.value, 10)); });
    }

    if (window.ResizeObserver) {
      var first = true;
      new ResizeObserver(function () {
        if (first) { first = false; fit(); return; }
        var cx = view.x + view.w / 2;
        var cy = view.y + view.h / 2;
        if (!measure()) { return; }
        view = { x: cx - width * perPx / 2, y: cy - height * perPx / 2, w: width * perPx, h: height * perPx };
        apply();
      }).observe(svg);
    } else {
      fit();
    }
  }

  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", start);
  } else {
    start();
  }
})();
