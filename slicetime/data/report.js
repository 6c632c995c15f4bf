(function () {
  "use strict";
  var body = document.body;
  var data = JSON.parse(document.getElementById("report-data").textContent);
  var S = data.s, runs = data.runs;
  var SEV = ["none", "note", "warning", "error"];
  var GLYPH = {error: "\u2715", warning: "\u25b3", note: "\u2022", none: ""};
  var PAGE = 200;
  var select = document.getElementById("severity-filter");
  var search = document.getElementById("run-search");
  var count = document.getElementById("shown-count");
  var printNote = document.getElementById("print-filter");
  var list = document.getElementById("run-list");
  var pinned = document.getElementById("pinned");
  var more = document.getElementById("more");
  var levels = ["all", "error", "warning", "note", "clean"];
  var names = null, matching = [], limit = PAGE, built = {};

  function el(tag, cls, text) {
    var node = document.createElement(tag);
    if (cls) { node.className = cls; }
    if (text !== undefined && text !== null) { node.textContent = text; }
    return node;
  }
  function plural(n, word) { return n + " " + word + (n === 1 ? "" : "s"); }
  function worst(r) { return r[3] ? 3 : r[4] ? 2 : r[5] ? 1 : 0; }
  function str(i) { return i < 0 ? "" : S[i]; }
  function chip(tagIndex) {
    var tag = data.tags[tagIndex];
    return el("span", "chip " + tag[1], tag[0]);
  }
  function use(drawing, caption) {
    var d = data.drawings[drawing], ns = document.querySelector("svg.sprite").namespaceURI;
    var svg = document.createElementNS(ns, "svg");
    svg.setAttribute("class", "diagram");
    svg.setAttribute("viewBox", "0 0 " + d[1] + " " + d[2]);
    svg.setAttribute("role", "img");
    svg.setAttribute("aria-label", caption || d[3]);
    var u = document.createElementNS(ns, "use");
    u.setAttribute("href", "#" + d[0]);
    u.setAttribute("width", d[1]);
    u.setAttribute("height", d[2]);
    svg.appendChild(u);
    return svg;
  }

  // a run is a row of the runs table; its details go in the row after it, built when
  // first opened (row._detail; row.open mirrors <details>)
  function setOpen(row, open) {
    if (open) { fill(row, +row.getAttribute("data-index")); }
    row.open = open;
    row.setAttribute("data-open", open ? "1" : "0");
    row._detail.hidden = !open;
    row.querySelector("button.open-run").setAttribute("aria-expanded", open ? "true" : "false");
  }

  function fill(row, i) {
    if (row.getAttribute("data-built")) { return; }
    row.setAttribute("data-built", "1");
    var r = runs[i], d = data.drawings[r[2]];
    var box = el("div", "run-body"), cols = el("div", "cols"), left = el("div");
    var dl = el("dl", "facts");
    data.facts[r[8]].forEach(function (fact) {
      dl.appendChild(el("dt", null, fact[0]));
      var dd = el("dd", null, fact[1]);
      if (fact[0] === "scheme") {
        dd.insertBefore(document.createTextNode(" "), dd.firstChild);
        dd.insertBefore(chip(r[1]), dd.firstChild);
      }
      dl.appendChild(dd);
    });
    var pairs = data.sources[r[9]][0], chain = data.sources[r[9]][1];
    function named(k) { return k === data.own_sidecar ? S[r[11]] : S[k]; }
    if (chain.length) {
      dl.appendChild(el("dt", null, "sidecars"));
      dl.appendChild(el("dd", null, chain.map(named).join(" → ")));
    }
    left.appendChild(dl);
    if (pairs.length) {
      left.appendChild(el("h4", null, "where each value came from"));
      var table = el("table", "sources");
      for (var k = 0; k < pairs.length; k += 2) {
        var tr = el("tr"), th = el("th", null, S[pairs[k]]), td = el("td");
        th.setAttribute("scope", "row");
        td.appendChild(el("code", null, named(pairs[k + 1])));
        tr.appendChild(th); tr.appendChild(td); table.appendChild(tr);
      }
      left.appendChild(table);
    }
    cols.appendChild(left);
    if (d[0]) {
      var figure = el("figure", "timing");
      figure.appendChild(use(r[2]));
      figure.appendChild(el("figcaption", null, d[4]));
      cols.appendChild(figure);
    } else {  // no usable timing: one line says why, no empty drawing
      left.appendChild(el("p", "muted no-drawing", d[3]));
    }
    box.appendChild(cols);
    if (r[15].length) {
      box.appendChild(el("p", "muted shared-note", plural(r[15].length, "finding") +
        " of a shared file, told once under \u201cFindings of shared files\u201d: " +
        r[15].map(function (k) { return data.shared[k][0]; }).join(", ")));
    }
    if (r[10].length) {
      box.appendChild(el("h4", null, "findings"));
      var ol = el("ol", "findings");
      r[10].forEach(function (f) {
        var sev = SEV[f[1]], li = el("li", "finding sev-" + sev);
        li.setAttribute("data-severity", sev);
        var head = el("div", "fhead");
        head.appendChild(el("span", "sev", GLYPH[sev] + " " + sev));
        head.appendChild(document.createTextNode(" "));
        head.appendChild(el("code", "code", S[f[0]]));
        li.appendChild(head);
        li.appendChild(el("p", "msg", str(f[2])));
        if (f[3] >= 0 || f[4] >= 0) {
          var where = el("p", "where");
          if (f[3] >= 0) {
            var a = el("span", null, "file ");
            a.appendChild(el("code", null, S[f[3]]));
            where.appendChild(a);
          }
          if (f[4] >= 0) {
            var b = el("span", null, "field ");
            b.appendChild(el("code", null, S[f[4]]));
            where.appendChild(b);
          }
          li.appendChild(where);
        }
        if (f[5] >= 0) { li.appendChild(el("p", "evidence", S[f[5]])); }
        if (f[6] >= 0) { li.appendChild(el("p", "hint", S[f[6]])); }
        ol.appendChild(li);
      });
      box.appendChild(ol);
    } else if (!r[15].length) {
      box.appendChild(el("p", "muted", "No findings."));
    }
    row._detail.firstChild.appendChild(box);
  }

  function section(i) {
    var r = runs[i], w = SEV[worst(r)];
    var row = el("tr", "run");
    row.id = "run-" + (i + 1);
    row.setAttribute("data-index", i);
    row.setAttribute("data-name", S[r[0]].toLowerCase());
    row.setAttribute("data-worst", w);
    var first = el("td", "path"), button = el("button", "open-run");
    button.type = "button";
    button.setAttribute("aria-expanded", "false");
    button.appendChild(el("span", "mark sev-" + w));
    button.appendChild(el("code", null, S[r[0]]));
    first.appendChild(button);
    row.appendChild(first);
    var scheme = el("td", "scheme");
    scheme.appendChild(chip(r[1]));
    scheme.appendChild(el("span", "label", " " + data.tags[r[1]][2]));
    row.appendChild(scheme);
    row.appendChild(el("td", "num", r[12] >= 0 ? S[r[12]] : "\u2014"));
    row.appendChild(el("td", "num", r[13] >= 0 ? String(r[13]) : "\u2014"));
    var found = el("td", "found"), any = false;
    [[r[3], "error"], [r[4], "warning"], [r[5], "note"]].forEach(function (c) {
      if (c[0]) {
        any = true;
        found.appendChild(el("span", "badge sev-" + c[1], plural(c[0], c[1])));
        found.appendChild(document.createTextNode(" "));
      }
    });
    if (!any) { found.appendChild(el("span", "badge sev-none", "no findings")); }
    row.appendChild(found);
    var detail = el("tr", "run-detail"), cell = el("td");
    cell.colSpan = 5;
    detail.appendChild(cell);
    detail.hidden = true;
    row._detail = detail;
    row.open = false;
    button.addEventListener("click", function () { setOpen(row, !row.open); });
    built[i] = row;
    return row;
  }

  var sortKey = "", sortDir = 1;
  function sortValue(i, key) {
    var r = runs[i];
    if (key === "name") { return S[r[0]]; }
    if (key === "scheme") { return data.tags[r[1]][2]; }
    if (key === "tr") { return r[14]; }
    if (key === "slices") { return r[13]; }
    return worst(r) * 1e6 + r[3] * 1e4 + r[4] * 100 + r[5];
  }
  function sortMatching() {
    if (!sortKey) { return; }
    matching.sort(function (a, b) {
      var x = sortValue(a, sortKey), y = sortValue(b, sortKey);
      return (x < y ? -1 : x > y ? 1 : a - b) * sortDir;
    });
  }

  function matches(i, level, words) {
    var w = worst(runs[i]);
    var rank = {note: 1, warning: 2, error: 3};
    if (level === "clean" ? w !== 0 : level !== "all" && w < rank[level]) { return false; }
    if (!words.length) { return true; }
    if (!names) { names = runs.map(function (r) { return S[r[0]].toLowerCase(); }); }
    var name = names[i];
    return words.every(function (word) { return name.indexOf(word) >= 0; });
  }

  function draw() {
    list.textContent = "";
    built = {};
    var shown = matching.slice(0, limit), frag = document.createDocumentFragment();
    shown.forEach(function (i) {
      var row = section(i);
      frag.appendChild(row);
      frag.appendChild(row._detail);
    });
    list.appendChild(frag);
    more.hidden = matching.length <= limit;
    count.textContent = matching.length + " of " + runs.length + " runs shown" +
      (matching.length > limit ? " (the first " + limit + " listed)" : "");
  }

  function apply() {
    var level = select.value;
    var words = search.value.toLowerCase().split(/\s+/).filter(Boolean);
    matching = [];
    for (var i = 0; i < runs.length; i += 1) {
      if (matches(i, level, words)) { matching.push(i); }
    }
    limit = PAGE;
    sortMatching();
    draw();
    body.setAttribute("data-severity", level);
    var parts = [];
    if (level !== "all") { parts.push(select.options[select.selectedIndex].text); }
    if (words.length) { parts.push("names containing \u201c" + search.value + "\u201d"); }
    printNote.textContent = parts.length ? "Printed with a filter: " + parts.join(", ") +
      " (" + matching.length + " of " + runs.length + " runs)." : "";
  }

  function store() {
    var parts = [];
    if (select.value !== "all") { parts.push("severity=" + select.value); }
    if (search.value) { parts.push("q=" + encodeURIComponent(search.value)); }
    var target = parts.length ? "#" + parts.join("&") : location.pathname + location.search;
    try { history.replaceState(null, "", target); } catch (e) { /* a page from disk may refuse */ }
  }

  function fromFragment() {
    var text = location.hash.slice(1);
    if (text.indexOf("=") >= 0) {
      text.split("&").forEach(function (part) {
        var cut = part.indexOf("=");
        var key = part.slice(0, cut), value = "";
        try { value = decodeURIComponent(part.slice(cut + 1).replace(/\+/g, " ")); }
        catch (e) { value = ""; }
        if (key === "severity" && levels.indexOf(value) >= 0) { select.value = value; }
        if (key === "q") { search.value = value; }
      });
      apply();
      return;
    }
    var m = /^run-(\d+)$/.exec(text);
    if (m) {
      var i = parseInt(m[1], 10) - 1;
      if (i < 0 || i >= runs.length) { return; }
      var target = built[i];
      if (!target) {
        pinned.textContent = "";
        target = section(i);
        pinned.appendChild(target);
        pinned.appendChild(target._detail);
      }
      setOpen(target, true);
      target.scrollIntoView();
    }
  }

  function outliers() {
    var box = document.getElementById("outliers"), ul = el("ul", "outliers"), n = 0, extra = 0;
    runs.forEach(function (r, i) {
      r[10].forEach(function (f) {
        if (S[f[0]].indexOf("dataset/") !== 0) { return; }
        if (n >= 500) { extra += 1; return; }
        n += 1;
        var li = el("li", "sev-" + SEV[f[1]]), a = el("a", null, S[r[0]]);
        a.href = "#run-" + (i + 1);
        li.appendChild(a);
        li.appendChild(document.createTextNode(" "));
        li.appendChild(el("code", null, S[f[0]]));
        li.appendChild(document.createTextNode(" " + str(f[2])));
        ul.appendChild(li);
      });
    });
    (data.shared || []).forEach(function (g) {  // a shared outlier: each of its runs
      if (g[0].indexOf("dataset/") !== 0) { return; }
      g[2].forEach(function (i) {
        if (n >= 500) { extra += 1; return; }
        n += 1;
        var li = el("li", "sev-" + SEV[g[1]]), a = el("a", null, S[runs[i][0]]);
        a.href = "#run-" + (i + 1);
        li.appendChild(a);
        li.appendChild(document.createTextNode(" "));
        li.appendChild(el("code", null, g[0]));
        ul.appendChild(li);
      });
    });
    if (n) {
      box.textContent = "";
      box.appendChild(ul);
      if (extra) {
        box.appendChild(el("p", "muted", "and " + extra + " more: filter the runs below"));
      }
    }
  }

  function picture() {
    var table = document.getElementById("picture-table");
    var cells = {}, thead = el("thead"), tr = el("tr"), tbody = el("tbody");
    runs.forEach(function (r, i) {
      var key = r[6] + ":" + r[7];
      (cells[key] = cells[key] || []).push(i);
    });
    tr.appendChild(el("th"));
    data.column_order.forEach(function (c) {
      var th = el("th");
      th.setAttribute("scope", "col");
      // one entity a line ("task-hum", "acq-mb"): a name never breaks inside a word
      data.columns[c].split(" ").forEach(function (part) {
        var cut = part.indexOf("-"), span = el("span", "part");
        if (cut > 0) {  // the entity's key small above its label: "task" over "hum"
          span.appendChild(el("small", null, part.slice(0, cut)));
          span.appendChild(el("span", null, part.slice(cut + 1)));
        } else {
          span.textContent = part;
        }
        th.appendChild(span);
      });
      tr.appendChild(th);
    });
    thead.appendChild(tr);
    data.subject_order.forEach(function (s) {
      var row = el("tr"), th = el("th", null, data.subjects[s]);
      th.setAttribute("scope", "row");
      row.appendChild(th);
      data.column_order.forEach(function (c) {
        var td = el("td");
        (cells[s + ":" + c] || []).forEach(function (i) {
          var r = runs[i], tag = data.tags[r[1]], w = SEV[worst(r)];
          var a = el("a", "cell " + tag[1] + " sev-" + w, tag[0]);
          a.href = "#run-" + (i + 1);
          var counts = [];
          if (r[3]) { counts.push(plural(r[3], "error")); }
          if (r[4]) { counts.push(plural(r[4], "warning")); }
          if (r[5]) { counts.push(plural(r[5], "note")); }
          a.title = S[r[0]] + " \u00b7 " + tag[2] + " \u00b7 " +
            (counts.join(", ") || "no findings");
          a.appendChild(el("b", null, GLYPH[w]));
          td.appendChild(a);
        });
        row.appendChild(td);
      });
      tbody.appendChild(row);
    });
    table.appendChild(thead);
    table.appendChild(tbody);
  }

  select.addEventListener("change", function () { apply(); store(); });
  search.addEventListener("input", function () { apply(); store(); });
  window.addEventListener("hashchange", fromFragment);
  more.addEventListener("click", function () { limit += PAGE; draw(); });
  document.getElementById("open-shown").addEventListener("click", function () {
    Object.keys(built).forEach(function (i) { setOpen(built[i], true); });
  });
  document.getElementById("close-all").addEventListener("click", function () {
    Object.keys(built).forEach(function (i) { setOpen(built[i], false); });
  });
  Array.prototype.forEach.call(document.querySelectorAll("button.sort"), function (b) {
    b.addEventListener("click", function () {
      var key = b.getAttribute("data-sort");
      sortDir = key === sortKey ? -sortDir : 1;
      sortKey = key;
      Array.prototype.forEach.call(document.querySelectorAll("button.sort"), function (o) {
        o.removeAttribute("data-dir");
      });
      b.setAttribute("data-dir", sortDir > 0 ? "up" : "down");
      sortMatching();
      limit = Math.max(limit, PAGE);
      draw();
    });
  });
  var wasOpen = {};
  window.addEventListener("beforeprint", function () {
    wasOpen = {};
    Object.keys(built).forEach(function (i) {
      wasOpen[i] = built[i].open;
      setOpen(built[i], true);
    });
  });
  window.addEventListener("afterprint", function () {
    Object.keys(built).forEach(function (i) { setOpen(built[i], wasOpen[i] || false); });
  });
  outliers();
  picture();
  apply();
  fromFragment();
  // the laid-out widths, for a browser test to read from the page's DOM: the page and
  // the dataset picture must fit the window without sideways scrolling
  var wrap = document.querySelector(".picture-wrap");
  body.setAttribute("data-page-width", String(document.documentElement.scrollWidth));
  body.setAttribute("data-picture-overflow",
                    String(Math.max(0, wrap.scrollWidth - wrap.clientWidth)));
  body.setAttribute("data-ready", "1");
})();
