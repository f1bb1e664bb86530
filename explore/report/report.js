/* explore report: the page's own script (no libraries besides bokeh's, no network).
 * Data comes from two JSON blocks; every text from the data is written with
 * textContent or as an attribute value, never as HTML. */
(function () {
  "use strict";

  var DATA = JSON.parse(document.getElementById("explore-data").textContent);
  var THUMBS = JSON.parse(document.getElementById("explore-thumbs").textContent);
  var LARGE = JSON.parse(document.getElementById("explore-large").textContent);
  var P = DATA.points;
  var N = P.id.length;
  var idIndex = {};
  for (var i = 0; i < N; i++) idIndex[P.id[i]] = i;
  var contextById = {};
  DATA.contexts.forEach(function (c) { contextById[c.id] = c; });

  // ------------------------------------------------------------------ helpers
  function el(tag, cls, text) {
    var e = document.createElement(tag);
    if (cls) e.className = cls;
    if (text !== undefined && text !== null) e.textContent = String(text);
    return e;
  }
  function svgEl(tag, attrs) {
    var e = document.createElementNS("http://www.w3.org/2000/svg", tag);
    for (var k in attrs) e.setAttribute(k, attrs[k]);
    return e;
  }
  function thumbSrc(id) {
    var t = THUMBS[id];
    return t ? "data:" + DATA.thumbMime + ";base64," + t : null;
  }
  function baseName(path) {
    var s = String(path || "");
    var k = Math.max(s.lastIndexOf("/"), s.lastIndexOf("\\"));
    return k >= 0 ? s.slice(k + 1) : s;
  }
  function photos(n) { return n === null || n === undefined ? "– photos" : n + (n === 1 ? " photo" : " photos"); }
  function short(text, n) { var t = String(text); return t.length > n ? t.slice(0, n - 1) + "…" : t; }
  function pct(v) { return v === null || v === undefined ? "–" : (100 * v).toFixed(1) + "\u00a0%"; }
  function contextName(cid) {
    var c = contextById[cid];
    return c ? c.name : "unassigned";
  }
  function hexToRgb(h) { return [parseInt(h.slice(1, 3), 16), parseInt(h.slice(3, 5), 16), parseInt(h.slice(5, 7), 16)]; }
  function rgbToHex(c) { return "#" + c.map(function (x) { var s = Math.round(x).toString(16); return s.length < 2 ? "0" + s : s; }).join(""); }
  function mix(a, b, t) { return [a[0] + (b[0] - a[0]) * t, a[1] + (b[1] - a[1]) * t, a[2] + (b[2] - a[2]) * t]; }
  var SEQ = DATA.colours.sequential.map(hexToRgb);
  function sequential(v) {
    if (v === null || v === undefined || isNaN(v)) return DATA.colours.unassigned;
    var x = Math.max(0, Math.min(1, v)) * (SEQ.length - 1);
    var k = Math.min(Math.floor(x), SEQ.length - 2);
    return rgbToHex(mix(SEQ[k], SEQ[k + 1], x - k));
  }
  // Same scale as colours.diverging_index in Python: log2(index / 100), clipped to [-2, 2].
  var LOW = [42, 111, 143], MID = [246, 243, 236], HIGH = [184, 67, 43];
  function diverging(index) {
    if (index === null || index === undefined || !isFinite(index)) return "#ebe7df";
    var t = Math.max(-2, Math.min(2, Math.log2(Math.max(index, 1e-9) / 100))) / 2;
    return rgbToHex(t >= 0 ? mix(MID, HIGH, t) : mix(MID, LOW, -t));
  }
  function indexChip(index) {
    var s = el("span", "bv-index", index === null || index === undefined ? "–" : Math.round(index));
    s.style.background = diverging(index);
    if (index && Math.abs(Math.log2(index / 100)) > 1.2) s.style.color = "#fff";
    s.title = "index (100 = same as the category)";
    return s;
  }
  function brandColour(b) { return DATA.colours.brand[b % DATA.colours.brand.length]; }

  // ------------------------------------------------------------------ thumbnails in static blocks
  function fillThumbs(root) {
    var blocks = (root || document).querySelectorAll(".thumbs[data-ids]");
    blocks.forEach(function (block) {
      if (block.dataset.filled) return;
      block.dataset.filled = "1";
      block.getAttribute("data-ids").split(" ").forEach(function (id) {
        if (!id) return;
        var src = thumbSrc(id);
        if (!src) return;
        var img = el("img", "zoomable");
        img.src = src;
        img.setAttribute("data-id", id);
        var k = idIndex[id];
        img.alt = k !== undefined ? baseName(P.file[k]) : id;
        img.title = img.alt;
        block.appendChild(img);
      });
    });
  }

  // ------------------------------------------------------------------ gallery (map selection and dialog)
  function fillGallery(container, countsBox, indices, limit) {
    container.textContent = "";
    countsBox.textContent = "";
    var byBrand = {};
    var withThumb = 0;
    indices.forEach(function (k) {
      byBrand[P.b[k]] = (byBrand[P.b[k]] || 0) + 1;
      if (P.t[k]) withThumb++;
    });
    var total = el("span", "chip", indices.length.toLocaleString() + " photos");
    total.style.fontWeight = "700";
    countsBox.appendChild(total);
    Object.keys(byBrand).sort(function (a, b) { return byBrand[b] - byBrand[a]; }).forEach(function (b) {
      var chip = el("span", "chip");
      var sw = el("span", "sw");
      sw.style.background = brandColour(+b);
      chip.appendChild(sw);
      chip.appendChild(document.createTextNode((DATA.brands[b] !== undefined ? DATA.brands[b] : "?") + ": " + byBrand[b]));
      chip.className = "chip brand-count";
      countsBox.appendChild(chip);
    });
    if (!indices.length) {
      container.appendChild(el("p", "fine wide", "No photos."));
      return;
    }
    var shown = 0;
    for (var j = 0; j < indices.length && shown < limit; j++) {
      var k = indices[j];
      var src = P.t[k] ? thumbSrc(P.id[k]) : null;
      if (!src) continue;
      var fig = el("figure");
      var img = el("img", "zoomable");
      img.src = src;
      img.setAttribute("data-id", P.id[k]);
      img.alt = baseName(P.file[k]);
      img.title = P.file[k] + "\n" + (DATA.brands[P.b[k]] || "") + " · " + (DATA.sources[P.s[k]] || "") + " · " + contextName(P.c[k]);
      fig.appendChild(img);
      fig.appendChild(el("figcaption", null, baseName(P.file[k])));
      container.appendChild(fig);
      shown++;
    }
    var note = [];
    if (shown < withThumb) note.push("showing " + shown + " of " + withThumb + " photos with a thumbnail");
    if (withThumb < indices.length) note.push((indices.length - withThumb) + " without a thumbnail in this file");
    if (note.length) {
      var p = el("p", "fine", note.join("; ") + ".");
      p.style.gridColumn = "1 / -1";
      container.appendChild(p);
    }
  }

  // ------------------------------------------------------------------ context map
  function mapModels() {
    if (!window.Bokeh || !window.Bokeh.documents || !window.Bokeh.documents.length) return null;
    var doc = window.Bokeh.documents[0];
    var src = doc.get_model_by_name("map_source");
    if (!src) return null;
    return { source: src, filter: doc.get_model_by_name("map_filter") };
  }

  var colourMode = "context";
  function coloursFor(mode) {
    var out = new Array(N);
    var k;
    if (mode === "brand") {
      for (k = 0; k < N; k++) out[k] = P.b[k] >= 0 ? brandColour(P.b[k]) : DATA.colours.unassigned;
    } else if (mode === "source") {
      for (k = 0; k < N; k++) out[k] = DATA.colours.source[DATA.sources[P.s[k]]] || DATA.colours.unassigned;
    } else if (mode === "category") {
      for (k = 0; k < N; k++) out[k] = P.k[k] >= 0 ? DATA.colours.category[P.k[k] % DATA.colours.category.length] : DATA.colours.unassigned;
    } else if (mode.indexOf("attr:") === 0) {
      var col = P.p[+mode.slice(5)] || [];
      for (k = 0; k < N; k++) out[k] = sequential(col[k]);
    } else {
      for (k = 0; k < N; k++) { var c = contextById[P.c[k]]; out[k] = c ? c.color : DATA.colours.unassigned; }
    }
    return out;
  }

  function drawLegend(mode) {
    var box = document.getElementById("map-legend");
    if (!box) return;
    box.textContent = "";
    function item(colour, label) {
      var s = el("span");
      var sw = el("span", "sw");
      sw.style.background = colour;
      s.appendChild(sw);
      s.appendChild(document.createTextNode(label));
      box.appendChild(s);
    }
    if (mode === "brand") DATA.brands.forEach(function (b, k) { item(brandColour(k), b); });
    else if (mode === "source") DATA.sources.forEach(function (s) { item(DATA.colours.source[s] || DATA.colours.unassigned, s); });
    else if (mode === "category") DATA.categories.forEach(function (c, k) { item(DATA.colours.category[k % DATA.colours.category.length], c); });
    else if (mode.indexOf("attr:") === 0) {
      var s = el("span");
      s.appendChild(document.createTextNode("probability of “" + DATA.attributes[+mode.slice(5)] + "”: 0"));
      var ramp = el("span", "ramp");
      ramp.style.background = "linear-gradient(to right, " + DATA.colours.sequential.join(", ") + ")";
      s.appendChild(ramp);
      s.appendChild(document.createTextNode("1"));
      box.appendChild(s);
    } else {
      DATA.contexts.forEach(function (c) { item(c.color, c.name); });
      item(DATA.colours.unassigned, "unassigned");
    }
  }

  function setColour(mode) {
    colourMode = mode;
    drawLegend(mode);
    var m = mapModels();
    if (!m) return;
    var data = Object.assign({}, m.source.data);
    data.color = coloursFor(mode);
    m.source.data = data;
  }

  function checkedSet(id) {
    var set = {};
    var box = document.getElementById(id);
    if (!box) return null;
    box.querySelectorAll("input[type=checkbox]").forEach(function (cb) { if (cb.checked) set[cb.value] = true; });
    return set;
  }
  function applyFilters() {
    var bs = checkedSet("filter-brand"), ks = checkedSet("filter-category"), ss = checkedSet("filter-source");
    var keep = new Array(N);
    var n = 0;
    for (var k = 0; k < N; k++) {
      keep[k] = !!((!bs || bs[P.b[k]]) && (!ks || ks[P.k[k]]) && (!ss || ss[P.s[k]]));
      if (keep[k]) n++;
    }
    var counter = document.getElementById("filter-count");
    if (counter) counter.textContent = n.toLocaleString() + " of " + N.toLocaleString() + " photos shown";
    var m = mapModels();
    if (m && m.filter) {
      m.filter.booleans = keep;
      m.source.selected.indices = m.source.selected.indices.filter(function (k) { return keep[k]; });
    }
  }

  var mouse = { x: 0, y: 0 };
  document.addEventListener("mousemove", function (ev) { mouse.x = ev.clientX; mouse.y = ev.clientY; }, { passive: true });
  var card = document.getElementById("hover-card");
  function hideCard() { if (card) card.hidden = true; }
  function showCard(k) {
    if (!card) return;
    var old = card.querySelector("img, .hc-none");
    var src = P.t[k] ? thumbSrc(P.id[k]) : null;
    var pic;
    if (src) { pic = el("img"); pic.src = src; pic.alt = baseName(P.file[k]); }
    else { pic = el("div", "hc-none", "no thumbnail in this file"); }
    card.replaceChild(pic, old);
    var text = card.querySelector(".hc-text");
    text.textContent = "";
    text.appendChild(el("b", null, DATA.brands[P.b[k]] !== undefined ? DATA.brands[P.b[k]] : ""));
    text.appendChild(el("div", null, (DATA.sources[P.s[k]] || "") + " photo"));
    text.appendChild(el("div", null, "context: " + contextName(P.c[k])));
    var scores = DATA.attributes.map(function (a, j) { return [a, P.p[j] ? P.p[j][k] : null]; })
      .filter(function (x) { return x[1] !== null && x[1] !== undefined; })
      .sort(function (x, y) { return y[1] - x[1]; }).slice(0, 3);
    scores.forEach(function (x) { text.appendChild(el("div", "fine", x[0] + " " + x[1].toFixed(2))); });
    text.appendChild(el("div", "fine", baseName(P.file[k])));
    card.hidden = false;
    var w = card.offsetWidth, h = card.offsetHeight;
    var left = mouse.x + 18, top = mouse.y + 18;
    if (left + w > window.innerWidth - 8) left = mouse.x - w - 18;
    if (top + h > window.innerHeight - 8) top = mouse.y - h - 18;
    card.style.left = Math.max(4, left) + "px";
    card.style.top = Math.max(4, top) + "px";
  }

  var gallery = document.getElementById("gallery");
  var galleryCounts = document.getElementById("gallery-counts");
  var galleryTitle = document.getElementById("gallery-title");

  window.ExploreReport = {
    data: DATA,
    mapHover: function (cb_data) {
      var idx = cb_data && cb_data.index && cb_data.index.indices;
      if (!idx || !idx.length) { hideCard(); return; }
      showCard(idx[0]);
    },
    mapSelect: function (indices) {
      if (!gallery) return;
      var list = Array.prototype.slice.call(indices || []);
      galleryTitle.textContent = list.length ? "Selected photos" : "Selected photos";
      if (!list.length) {
        gallery.textContent = "";
        galleryCounts.textContent = "";
        gallery.appendChild(el("p", "fine wide", "Nothing selected yet: drag a box on the map."));
        return;
      }
      fillGallery(gallery, galleryCounts, list, DATA.galleryLimit);
    },
    setColour: setColour,
    applyFilters: applyFilters,
    openPhotos: openPhotos,
    coloursFor: coloursFor,
  };

  var frame = document.getElementById("map-frame");
  if (frame) frame.addEventListener("mouseleave", hideCard);
  var colourSelect = document.getElementById("colour-select");
  if (colourSelect) colourSelect.addEventListener("change", function () { setColour(colourSelect.value); });
  ["filter-brand", "filter-category", "filter-source"].forEach(function (id) {
    var box = document.getElementById(id);
    if (box) box.addEventListener("change", applyFilters);
  });
  var clear = document.getElementById("gallery-clear");
  if (clear) clear.addEventListener("click", function () {
    var m = mapModels();
    if (m) m.source.selected.indices = [];
    window.ExploreReport.mapSelect([]);
  });

  // ------------------------------------------------------------------ photo dialog (click-through)
  var dialog = document.getElementById("photo-dialog");
  function openPhotos(brandName, contextId, sourceName) {
    var b = brandName === null ? -1 : DATA.brands.indexOf(brandName);
    var s = sourceName && sourceName !== "all" ? DATA.sources.indexOf(sourceName) : -1;
    var list = [];
    for (var k = 0; k < N; k++) {
      if ((b < 0 || P.b[k] === b) && (s < 0 || P.s[k] === s) && (contextId === null || P.c[k] === contextId)) list.push(k);
    }
    var title = (brandName !== null ? brandName + " · " : "") + (contextId !== null ? contextName(contextId) : "all contexts") +
      (s >= 0 ? " · " + sourceName + " photos" : "");
    dialog.querySelector("h3").textContent = title;
    fillGallery(dialog.querySelector(".pd-gallery"), dialog.querySelector(".pd-counts"), list, 400);
    dialog.hidden = false;
    document.getElementById("photo-dialog-close").focus();
  }
  function closePhotos() { dialog.hidden = true; }
  document.getElementById("photo-dialog-close").addEventListener("click", closePhotos);
  dialog.addEventListener("click", function (ev) { if (ev.target === dialog) closePhotos(); });
  document.addEventListener("keydown", function (ev) {
    if (ev.key !== "Escape") return;
    if (!lightbox.hidden) { closeLightbox(); return; }
    if (!dialog.hidden) closePhotos();
  });

  // ------------------------------------------------------------------ photo viewer (click a thumbnail)
  var lightbox = document.getElementById("lightbox");
  var lightboxReturn = null;
  function openLightbox(id) {
    var k = idIndex[id];
    var large = LARGE[id];
    var src = large ? "data:" + DATA.thumbMime + ";base64," + large : thumbSrc(id);
    if (!src) return;
    var img = document.getElementById("lightbox-img");
    img.src = src;
    img.alt = k !== undefined ? baseName(P.file[k]) : id;
    img.className = large ? "large" : "small";
    document.getElementById("lightbox-title").textContent = k !== undefined ? baseName(P.file[k]) : id;
    var facts = document.getElementById("lightbox-facts");
    facts.textContent = "";
    function fact(name, value) { facts.appendChild(el("dt", null, name)); facts.appendChild(el("dd", null, value)); }
    if (k !== undefined) {
      fact("brand", DATA.brands[P.b[k]] !== undefined ? DATA.brands[P.b[k]] : "–");
      fact("category", DATA.categories[P.k[k]] !== undefined ? DATA.categories[P.k[k]] : "–");
      fact("source", DATA.sources[P.s[k]] !== undefined ? DATA.sources[P.s[k]] + " photo" : "–");
      fact("context", contextName(P.c[k]));
      DATA.attributes.forEach(function (a, j) {
        var v = P.p[j] ? P.p[j][k] : null;
        if (v !== null && v !== undefined) fact(a, "probability " + v.toFixed(2));
      });
      fact("file", P.file[k]);
    }
    document.getElementById("lightbox-size").textContent = large
      ? "A larger copy is embedded for context exemplars."
      : "Only a small thumbnail of this photo is in the file; the original is in the study's image folder.";
    lightboxReturn = document.activeElement;
    lightbox.hidden = false;
    document.getElementById("lightbox-close").focus();
  }
  function closeLightbox() {
    lightbox.hidden = true;
    if (lightboxReturn && lightboxReturn.focus) lightboxReturn.focus();
  }
  document.getElementById("lightbox-close").addEventListener("click", closeLightbox);
  lightbox.addEventListener("click", function (ev) { if (ev.target === lightbox) closeLightbox(); });
  document.addEventListener("click", function (ev) {
    var t = ev.target;
    if (t && t.tagName === "IMG" && t.classList.contains("zoomable") && t.getAttribute("data-id")) openLightbox(t.getAttribute("data-id"));
  });
  document.querySelectorAll(".photo-row").forEach(function (row) {
    function go() {
      var c = row.getAttribute("data-context");
      openPhotos(row.getAttribute("data-brand"), c === null ? null : +c, row.getAttribute("data-source"));
    }
    row.addEventListener("click", go);
    row.addEventListener("keydown", function (ev) { if (ev.key === "Enter") go(); });
  });
  document.querySelectorAll(".finding-photos").forEach(function (btn) {
    btn.addEventListener("click", function () {
      openPhotos(btn.getAttribute("data-brand"), +btn.getAttribute("data-context"), btn.getAttribute("data-source"));
    });
  });
  document.querySelectorAll(".show-photos").forEach(function (btn) {
    btn.addEventListener("click", function () { openPhotos(null, +btn.getAttribute("data-context")); });
  });

  // ------------------------------------------------------------------ brand view
  function attrSvg(rows) {
    // rows: [{label, share, low, high, colour}]
    var rowH = 16, width = 300, left = 92, right = 50;
    var svg = svgEl("svg", { viewBox: "0 0 " + width + " " + (rows.length * rowH + 4), role: "img" });
    rows.forEach(function (r, j) {
      var y = j * rowH + 2;
      var scale = function (v) { return left + (width - left - right) * Math.max(0, Math.min(1, v)); };
      var lab = svgEl("text", { x: 0, y: y + 11, "font-size": 10, fill: "#7b7264" });
      lab.textContent = r.label;
      svg.appendChild(lab);
      svg.appendChild(svgEl("rect", { x: left, y: y + 2, width: width - left - right, height: rowH - 5, fill: "#ece6da", rx: 2 }));
      if (r.share !== null) {
        svg.appendChild(svgEl("rect", { x: left, y: y + 2, width: scale(r.share) - left, height: rowH - 5, fill: r.colour, rx: 2 }));
      }
      if (r.low !== null && r.high !== null) {
        svg.appendChild(svgEl("line", { x1: scale(r.low), x2: scale(r.high), y1: y + rowH / 2 - 0.5, y2: y + rowH / 2 - 0.5, stroke: "#1e2a36", "stroke-width": 1.4 }));
      }
      var val = svgEl("text", { x: width - right + 4, y: y + 11, "font-size": 10, fill: "#1e2a36" });
      val.textContent = pct(r.share);
      svg.appendChild(val);
    });
    return svg;
  }

  function mapSvg(points, brand) {
    var w = 200, h = 150, pad = 16;
    var xs = points.map(function (p) { return p.x; }).filter(isFinite);
    var ys = points.map(function (p) { return p.y; }).filter(isFinite);
    var x0 = Math.min.apply(null, xs), x1 = Math.max.apply(null, xs);
    var y0 = Math.min.apply(null, ys), y1 = Math.max.apply(null, ys);
    var sx = function (v) { return pad + (w - 2 * pad) * (x1 > x0 ? (v - x0) / (x1 - x0) : 0.5); };
    var sy = function (v) { return h - pad - (h - 2 * pad) * (y1 > y0 ? (v - y0) / (y1 - y0) : 0.5); };
    var svg = svgEl("svg", { viewBox: "0 0 " + w + " " + h, role: "img" });
    svg.appendChild(svgEl("line", { x1: pad, x2: w - pad, y1: sy(0), y2: sy(0), stroke: "#eee7da" }));
    svg.appendChild(svgEl("line", { x1: sx(0), x2: sx(0), y1: pad, y2: h - pad, stroke: "#eee7da" }));
    var mine = null;
    points.forEach(function (p) {
      if (!isFinite(p.x) || !isFinite(p.y)) return;
      if (p.brand === brand) { mine = p; return; }
      svg.appendChild(svgEl("circle", { cx: sx(p.x), cy: sy(p.y), r: 3.2, fill: "#c4bcae" }));
      var right = sx(p.x) > w / 2;
      var t = svgEl("text", { x: sx(p.x) + (right ? -5 : 5), y: sy(p.y) - 4, "font-size": 8, fill: "#9a9183", "text-anchor": right ? "end" : "start" });
      t.textContent = short(p.brand, 16);
      svg.appendChild(t);
    });
    if (mine) {
      svg.appendChild(svgEl("circle", { cx: sx(mine.x), cy: sy(mine.y), r: 6, fill: "#b8432b", stroke: "#fff", "stroke-width": 1.5 }));
      var mr = sx(mine.x) > w / 2;
      var t = svgEl("text", { x: sx(mine.x) + (mr ? -9 : 9), y: sy(mine.y) + 3.5, "font-size": 10, "font-weight": 700, fill: "#1e2a36", "text-anchor": mr ? "end" : "start" });
      t.textContent = short(mine.brand, 22);
      svg.appendChild(t);
    }
    return svg;
  }

  function renderBrand(bIndex) {
    var brand = DATA.brands[bIndex];
    var view = DATA.brandView[brand] || { contexts: [], signature: [], unexpected: [], attributes: [] };
    document.querySelectorAll(".bv-brand").forEach(function (s) { s.textContent = brand; });

    var box = document.getElementById("bv-contexts");
    box.textContent = "";
    var rows = view.contexts.filter(function (c) { return c.source === "all"; })
      .sort(function (a, b) { return (b.share || 0) - (a.share || 0); });
    if (!rows.length) box.appendChild(el("p", "missing", "No context results for this brand."));
    var maxShare = Math.max.apply(null, rows.map(function (c) { return c.share || 0; }).concat([0.01]));
    rows.forEach(function (c) {
      var row = el("div", "bv-row");
      var name = el("div", "bv-name");
      var title = el("span", null, c.name);
      title.style.cursor = "pointer";
      title.title = "show these photos";
      title.addEventListener("click", function () { openPhotos(brand, c.id); });
      name.appendChild(title);
      var th = el("div", "thumbs");
      th.setAttribute("data-ids", (c.exemplars || []).join(" "));
      name.appendChild(th);
      row.appendChild(name);
      var barBox = el("div");
      var bar = el("div", "bv-bar");
      var fill = el("span");
      fill.style.width = (100 * (c.share || 0) / maxShare).toFixed(1) + "%";
      bar.appendChild(fill);
      barBox.appendChild(bar);
      barBox.appendChild(el("div", "bv-share", pct(c.share) + " · " + photos(c.count)));
      var bySource = view.contexts.filter(function (o) { return o.id === c.id && o.source !== "all"; })
        .map(function (o) { return o.source + "\u00a0" + (o.share === null ? "–" : Math.round(100 * o.share) + "\u00a0%"); });
      if (bySource.length) barBox.appendChild(el("div", "bv-share", bySource.join(" · ")));
      row.appendChild(barBox);
      row.appendChild(indexChip(c.index));
      box.appendChild(row);
    });
    // Photos in no context: a row of their own (no index), with advice when they are many.
    var un = (view.unassigned || []).filter(function (u) { return u.source === "all"; })[0];
    if (un && un.count) {
      var urow = el("div", "bv-row bv-unassigned");
      urow.appendChild(el("div", "bv-name", "unassigned (in no context)"));
      var ubox = el("div");
      ubox.appendChild(el("div", "bv-share", pct(un.share) + " · " + photos(un.count)));
      var usrc = (view.unassigned || []).filter(function (u) { return u.source !== "all"; })
        .map(function (u) { return u.source + "\u00a0" + (u.share === null ? "–" : Math.round(100 * u.share) + "\u00a0%"); });
      if (usrc.length) ubox.appendChild(el("div", "bv-share", usrc.join(" · ")));
      urow.appendChild(ubox);
      urow.appendChild(el("div"));
      box.appendChild(urow);
      if (un.share !== null && un.share > 0.3) {
        box.appendChild(el("p", "fine bv-advice", "More than 30 % of this brand's photos fit no context, so the " +
          "shares above describe only part of its photos. More photos per brand, or a smaller minimum context " +
          "size (contexts.min_cluster_size), usually assign more."));
      }
    }
    fillThumbs(box);

    ["signature", "unexpected"].forEach(function (key) {
      var list = document.getElementById("bv-" + key);
      list.textContent = "";
      var items = view[key] || [];
      if (!items.length) { list.appendChild(el("p", "fine", "None for this brand.")); return; }
      // One entry per context; the sources in which it stands out are listed with their index.
      var groups = {}, order = [];
      items.forEach(function (it) {
        var key = it.id === null ? it.name : it.id;
        if (!groups[key]) { groups[key] = []; order.push(key); }
        groups[key].push(it);
      });
      var rank = { all: 0, consumer: 1, owned: 2 };
      order.map(function (key) {
        var g = groups[key].slice().sort(function (a, b) { return (rank[a.source] || 0) - (rank[b.source] || 0); });
        return { main: g[0], all: g };
      }).sort(function (a, b) { return (b.main.index || 0) - (a.main.index || 0); }).forEach(function (grp) {
        var it = grp.main;
        var d = el("div", "bv-item");
        d.appendChild(el("b", null, "index " + (it.index === null ? "–" : Math.round(it.index))));
        d.appendChild(document.createTextNode(it.name));
        d.appendChild(el("div", "fine", pct(it.share) + " of the brand's" + (it.source && it.source !== "all" ? " " + it.source : "") +
          " photos" + (it.count !== null ? " · " + photos(it.count) : "")));
        if (grp.all.length > 1 || (it.source && it.source !== "all")) {
          d.appendChild(el("div", "fine", "stands out in: " + grp.all.map(function (o) {
            return (o.source || "all") + " photos (" + (o.index === null ? "–" : Math.round(o.index)) + ")";
          }).join(", ")));
        }
        d.title = "show these photos";
        d.addEventListener("click", function () { openPhotos(brand, it.id === null ? null : +it.id, it.source); });
        list.appendChild(d);
      });
    });

    var abox = document.getElementById("bv-attributes");
    abox.textContent = "";
    var byAttr = {};
    view.attributes.forEach(function (a) { (byAttr[a.attribute] = byAttr[a.attribute] || {})[a.source] = a; });
    var names = DATA.attributes.filter(function (a) { return byAttr[a]; });
    if (!names.length) abox.appendChild(el("p", "missing", "No attribute results for this brand."));
    names.forEach(function (a) {
      var rec = byAttr[a];
      var block = el("div", "bv-attr");
      var sig = (rec.consumer && rec.consumer.significantGap) || (rec.all && rec.all.significantGap);
      block.appendChild(el("div", "bv-attr-name", a + (sig ? "  ◆" : "")));
      var rws = [];
      ["consumer", "owned"].forEach(function (s) {
        if (rec[s]) rws.push({ label: s + " (" + rec[s].n + ")", share: rec[s].share, low: rec[s].low, high: rec[s].high, colour: DATA.colours.source[s] });
      });
      if (!rws.length && rec.all) rws.push({ label: "all (" + rec.all.n + ")", share: rec.all.share, low: rec.all.low, high: rec.all.high, colour: "#7b7264" });
      block.appendChild(attrSvg(rws));
      abox.appendChild(block);
    });

    var mbox = document.getElementById("bv-maps");
    mbox.textContent = "";
    if (!DATA.brandMaps.length) { mbox.appendChild(el("p", "fine", "No brand map in this run.")); }
    else {
      var grid = el("div", "bv-maps");
      DATA.brandMaps.forEach(function (m) {
        var cell = el("div", "bv-map");
        cell.appendChild(el("p", null, m.title));
        cell.appendChild(mapSvg(m.points, brand));
        grid.appendChild(cell);
      });
      mbox.appendChild(grid);
    }
  }
  var brandSelect = document.getElementById("brand-select");
  if (brandSelect) {
    brandSelect.addEventListener("change", function () { renderBrand(+brandSelect.value); });
    renderBrand(+brandSelect.value);
  }

  // ------------------------------------------------------------------ CSV download (embedded data)
  function csvCell(v) {
    if (v === null || v === undefined) return "";
    var s = String(v);
    // Spreadsheet formula injection guard (OWASP "CSV Injection", common practice):
    // a text cell starting with = + - @ tab or CR gets a leading apostrophe unless it is a number.
    if (typeof v === "string" && /^[=+\-@\t\r]/.test(s) && isNaN(Number(s))) s = "'" + s;
    if (/[",\n\r]/.test(s)) s = '"' + s.replace(/"/g, '""') + '"';
    return s;
  }
  function toCsv(table) {
    var lines = [table.columns.map(csvCell).join(",")];
    table.rows.forEach(function (r) { lines.push(r.map(csvCell).join(",")); });
    return lines.join("\r\n") + "\r\n";
  }
  // The plotted images: built here from the point payload (and the map's positions) when asked for.
  function photosTable() {
    var columns = ["image_id", "relpath", "brand", "category", "source", "context_id", "context", "map_x", "map_y"]
      .concat(DATA.attributes.map(function (a) { return "p_" + a; }));
    var m = mapModels();
    var xs = m ? m.source.data.x : null, ys = m ? m.source.data.y : null;
    var rows = new Array(N);
    for (var k = 0; k < N; k++) {
      var r = [P.id[k], P.file[k], DATA.brands[P.b[k]], DATA.categories[P.k[k]], DATA.sources[P.s[k]], P.c[k], contextName(P.c[k]),
        xs ? Number(xs[k].toPrecision(6)) : null, ys ? Number(ys[k].toPrecision(6)) : null];
      for (var j = 0; j < DATA.attributes.length; j++) r.push(P.p[j] ? P.p[j][k] : null);
      rows[k] = r;
    }
    return { columns: columns, rows: rows };
  }
  function tableNamed(name) {
    if (name === "photos") return N ? photosTable() : null;
    return DATA.tables[name] || null;
  }
  window.ExploreReport.toCsv = function (name) { var t = tableNamed(name); return t ? toCsv(t) : null; };
  document.querySelectorAll("button.csv").forEach(function (btn) {
    var name = btn.getAttribute("data-table");
    if (!(name === "photos" ? N : DATA.tables[name])) { btn.disabled = true; btn.title = "not in this run"; return; }
    btn.addEventListener("click", function () {
      var blob = new Blob(["\ufeff" + toCsv(tableNamed(name))], { type: "text/csv;charset=utf-8" });
      var a = document.createElement("a");
      a.href = URL.createObjectURL(blob);
      a.download = name + ".csv";
      document.body.appendChild(a);
      a.click();
      setTimeout(function () { URL.revokeObjectURL(a.href); a.remove(); }, 1000);
    });
  });

  // ------------------------------------------------------------------ charts as images (save, print)
  function plotView(name) {
    if (!window.Bokeh || !Bokeh.documents || !Bokeh.documents.length) return null;
    var model = Bokeh.documents[0].get_model_by_name(name);
    return model && Bokeh.index ? Bokeh.index.get_one(model) : null;
  }
  function chartLayer(name, type) {
    var view = plotView(name);
    return view ? view.export(type, type === "png") : null;
  }
  function chartPng(name) {
    var layer = chartLayer(name, "png");
    return layer ? layer.canvas.toDataURL("image/png") : null;
  }
  function chartFileName(name, ext) {
    var study = (document.getElementById("study-name") || {}).textContent || "report";
    return (study + "-" + name).replace(/[^A-Za-z0-9._-]+/g, "_").slice(0, 120) + "." + ext;
  }
  function saveBlob(blob, filename) {
    var a = document.createElement("a");
    a.href = URL.createObjectURL(blob);
    a.download = filename;
    document.body.appendChild(a);
    a.click();
    setTimeout(function () { URL.revokeObjectURL(a.href); a.remove(); }, 1000);
  }
  document.querySelectorAll("button.save-png, button.save-svg").forEach(function (btn) {
    btn.addEventListener("click", function () {
      var name = btn.getAttribute("data-chart");
      var type = btn.classList.contains("save-svg") ? "svg" : "png";
      var layer = chartLayer(name, type);
      if (!layer) return;
      layer.to_blob().then(function (blob) { saveBlob(blob, chartFileName(name, type)); });
    });
  });
  // Printing: each chart is replaced by a picture of itself that scales to the paper (a live
  // canvas keeps its screen width, and WebGL canvases may print blank).
  function preparePrint() {
    var made = 0;
    document.querySelectorAll(".chart[data-chart]").forEach(function (box) {
      var name = box.getAttribute("data-chart");
      var view = plotView(name);
      if (!view) return;
      var url;
      try { url = chartPng(name); } catch (e) { return; }
      if (!url) return;
      var img = box.querySelector("img.print-img");
      if (!img) { img = el("img", "print-img"); img.alt = "chart " + name; box.appendChild(img); }
      img.src = url;
      img.style.width = Math.round(view.bbox ? view.bbox.width : 600) + "px";
      made++;
    });
    return made;
  }
  window.ExploreReport.chartPng = chartPng;
  window.ExploreReport.openLightbox = openLightbox;
  window.ExploreReport.preparePrint = preparePrint;
  // Chromium fires beforeprint for the print dialog, for --print-to-pdf and for DevTools' printToPDF
  // (playwright's page.pdf), so the pictures are made only when printing, not on every load.
  window.addEventListener("beforeprint", preparePrint);
  (function whenIdle() {
    if (window.Bokeh && Bokeh.documents && Bokeh.documents.length && Bokeh.documents[0].is_idle) {
      document.body.setAttribute("data-print-ready", "1");
    } else {
      setTimeout(whenIdle, 100);
    }
  })();

  // ------------------------------------------------------------------ start
  fillThumbs(document);
  drawLegend("context");
  applyFilters();
})();
