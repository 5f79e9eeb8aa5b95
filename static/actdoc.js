/* actdoc dashboard behaviour: draw the embedded figures, upload dumps, follow analyses. */
(function () {
  "use strict";

  /* Nothing leaves this machine: no "Share chart" (it posts the figure to a cloud service), no
     edit-in-the-cloud link, no logo link, no server address to post to. The PNG download stays:
     it is made in the browser. */
  var CHART_CONFIG = {
    responsive: true,
    displaylogo: false,
    showSendToCloud: false,
    showEditInChartStudio: false,
    showLink: false,
    linkText: "",
    plotlyServerURL: "",
    showTips: false,
    modeBarButtonsToRemove: ["sendChartToCloud", "sendDataToCloud", "editInChartStudio",
                             "select2d", "lasso2d"],
    toImageButtonOptions: { format: "png" }
  };

  /* Figures travel as JSON in <script type="application/json"> blocks; draw each one. */
  function drawCharts() {
    if (typeof Plotly === "undefined") return;
    document.querySelectorAll(".chart[data-figure]").forEach(function (el) {
      var source = document.getElementById(el.dataset.figure);
      if (!source) return;
      var figure = JSON.parse(source.textContent);
      Plotly.newPlot(el, figure.data, figure.layout, CHART_CONFIG);
      if (el.dataset.unitUrl) {
        el.on("plotly_click", function (event) {
          var point = event.points && event.points[0];
          if (point && point.customdata !== undefined && point.customdata !== null) {
            /* the unit map carries [unit, x, y]; the norm bars the unit alone */
            var unit = Array.isArray(point.customdata) ? point.customdata[0] : point.customdata;
            window.location.href = el.dataset.unitUrl + unit;
          }
        });
      }
      el.dataset.drawn = "yes";
    });
  }

  /* Upload through the API; the file picker and drag and drop both end here. */
  function upload(zone, file) {
    var message = zone.querySelector(".message");
    var body = new FormData();
    var kinds = zone.querySelector("input[name=activation]");
    body.append("file", file);
    if (kinds && kinds.value.trim()) body.append("activation", kinds.value);
    message.className = "message";
    message.textContent = "Sending " + file.name + " …";
    fetch(zone.dataset.api, { method: "POST", body: body, headers: { Accept: "application/json" } })
      .then(function (response) {
        return response.json().then(function (data) { return { ok: response.ok, data: data }; });
      })
      .then(function (result) {
        if (!result.ok) throw new Error(result.data.error || "the upload failed");
        message.textContent = result.data.duplicate
          ? "Already on the shelf; opening it." : "Stored; the analysis has started.";
        window.location.href = result.data.page;
      })
      .catch(function (error) {
        message.className = "message error";
        message.textContent = error.message;
      });
  }

  function wireUploads() {
    document.querySelectorAll(".dropzone").forEach(function (zone) {
      var input = zone.querySelector("input[type=file]");
      var submit = zone.querySelector("button[type=submit]");
      if (submit) submit.hidden = true;  /* with script, choosing a file is enough */
      input.addEventListener("change", function () {
        if (input.files.length) upload(zone, input.files[0]);
      });
      ["dragenter", "dragover"].forEach(function (name) {
        zone.addEventListener(name, function (event) {
          event.preventDefault();
          zone.classList.add("over");
        });
      });
      ["dragleave", "drop"].forEach(function (name) {
        zone.addEventListener(name, function () { zone.classList.remove("over"); });
      });
      zone.addEventListener("drop", function (event) {
        event.preventDefault();
        if (event.dataTransfer.files.length) upload(zone, event.dataTransfer.files[0]);
      });
    });
  }

  /* Progress bars poll the dump's JSON and reload the page once the analysis has ended, or
     once the check has read the file (its layers and samples then show). */
  function followProgress() {
    var bars = document.querySelectorAll("[data-poll]");
    if (!bars.length) return;
    function poll() {
      var pending = 0, newlyChecked = 0;
      var requests = Array.prototype.map.call(bars, function (bar) {
        return fetch(bar.dataset.poll, { headers: { Accept: "application/json" } })
          .then(function (response) { return response.json(); })
          .then(function (dump) {
            var fill = bar.querySelector(".progress > div");
            var label = bar.querySelector(".progress-label");
            if (fill) fill.style.width = Math.round(dump.progress * 100) + "%";
            if (label) label.textContent = dump.stage + (dump.stage === "analysing"
              ? " · " + Math.round(dump.progress * 100) + "%" : "");
            if (dump.status === "queued" || dump.status === "analysing") pending += 1;
            if (dump.checked && bar.dataset.checked === "no") newlyChecked += 1;
          });
      });
      Promise.all(requests).then(function () {
        if (pending && !newlyChecked) window.setTimeout(poll, 600); else window.location.reload();
      }).catch(function () { window.setTimeout(poll, 2000); });
    }
    window.setTimeout(poll, 400);
  }

  function wireConfirms() {
    document.querySelectorAll("form[data-confirm]").forEach(function (form) {
      form.addEventListener("submit", function (event) {
        if (!window.confirm(form.dataset.confirm)) event.preventDefault();
      });
    });
  }

  /* The Shelf's compare button: enabled once two dumps are ticked. */
  function wireDriftPicker() {
    var form = document.getElementById("drift-form");
    if (!form) return;
    var button = form.querySelector("button[type=submit]");
    var boxes = document.querySelectorAll('input[type=checkbox][form="drift-form"]');
    function update() {
      var ticked = Array.prototype.filter.call(boxes, function (box) { return box.checked; });
      button.disabled = ticked.length < 2;
      button.textContent = ticked.length >= 2
        ? "Compare the " + ticked.length + " ticked dumps" : "Compare the ticked dumps";
    }
    Array.prototype.forEach.call(boxes, function (box) {
      box.addEventListener("change", update);
    });
    update();
  }

  /* The Shelf's search, filter and sort, live in the browser. Without script the same form
     asks the server (?q=&show=&sort=), which answers with the list already arranged. */
  function wireShelfTools() {
    var form = document.getElementById("shelf-tools");
    var body = document.getElementById("shelf-rows");
    if (!form || !body) return;
    var search = document.getElementById("shelf-search");
    var show = document.getElementById("shelf-show");
    var sort = document.getElementById("shelf-sort");
    var count = document.getElementById("shelf-count");
    var none = document.getElementById("shelf-none");
    var apply = document.getElementById("shelf-apply");
    var rows = Array.prototype.slice.call(body.rows);
    var total = Number(form.dataset.total);
    if (rows.length < total) {
      /* the server already narrowed this list: ask it again rather than lose rows */
      [show, sort].forEach(function (box) {
        box.addEventListener("change", function () { form.submit(); });
      });
      return;
    }
    var names = new Intl.Collator(undefined, { numeric: true, sensitivity: "base" });
    var orders = {
      name: function (a, b) { return names.compare(a.dataset.name, b.dataset.name); },
      newest: function (a, b) { return b.dataset.created.localeCompare(a.dataset.created); },
      oldest: function (a, b) { return a.dataset.created.localeCompare(b.dataset.created); },
      worst: function (a, b) {
        return (b.dataset.critical - a.dataset.critical) || (b.dataset.warning - a.dataset.warning)
          || names.compare(a.dataset.name, b.dataset.name);
      },
      size: function (a, b) { return b.dataset.size - a.dataset.size; }
    };
    if (apply) apply.hidden = true;
    function update() {
      var words = search.value.toLowerCase().split(/\s+/).filter(Boolean);
      var shown = 0;
      rows.slice().sort(orders[sort.value] || orders.name).forEach(function (row) {
        var hit = words.every(function (word) { return row.dataset.search.indexOf(word) >= 0; })
          && (show.value === "all" || row.dataset.show === show.value);
        row.hidden = !hit;
        if (hit) shown += 1;
        body.appendChild(row);
      });
      count.textContent = shown + " of " + total + " dump" + (total === 1 ? "" : "s") + " shown";
      if (none) none.hidden = shown > 0;
      var query = new URLSearchParams();
      if (search.value) query.set("q", search.value);
      if (show.value !== "all") query.set("show", show.value);
      if (sort.value !== "name") query.set("sort", sort.value);
      var text = query.toString();
      window.history.replaceState(null, "", window.location.pathname + (text ? "?" + text : ""));
    }
    form.addEventListener("submit", function (event) { event.preventDefault(); update(); });
    search.addEventListener("input", update);
    show.addEventListener("change", update);
    sort.addEventListener("change", update);
  }

  /* A table wider than its box scrolls inside it: keyboard users must reach that box too
     (WCAG 2.1 SC 2.1.1), so it takes the focus and is named after its panel's heading. */
  function focusableScrollers() {
    document.querySelectorAll(".scroll").forEach(function (box) {
      if (box.scrollWidth <= box.clientWidth || box.hasAttribute("tabindex")) return;
      var panel = box.closest("section, .panel");
      var heading = panel && panel.querySelector("h2, h3");
      box.tabIndex = 0;
      box.setAttribute("role", "region");
      box.setAttribute("aria-label", (heading ? heading.textContent.trim() : "table") +
        " (scrolls sideways)");
    });
  }

  document.addEventListener("DOMContentLoaded", function () {
    focusableScrollers();
    wireShelfTools();
    wireConfirms();
    wireDriftPicker();
    drawCharts();
    wireUploads();
    followProgress();
  });
})();
