/* comove history pages: sorting of tables and the alert filter.
 *
 * Progressive enhancement only: every table is complete in the HTML, and this script
 * adds (1) a sort button to each header of a table with class "sortable" and (2) the
 * filter form of the alert index, which stays hidden when the script does not run.
 * Nothing is fetched: the rows carry their own data (data-state, data-rule, data-opened,
 * data-groups, data-search), so the pages work opened straight from disk (file://) as well
 * as served. A filter can be given in the address: index.html?q=KLV&state=open or
 * index.html#rule=R&opened=2026-03-05 (the part after # wins); changing the form writes it
 * back after the #. The busy-day summaries link to such addresses. (3) A "Copy" button
 * beside each acknowledge command of a pair's page copies it to the clipboard.
 */
(function () {
  "use strict";

  var FILTER_KEYS = ["q", "state", "rule", "group", "opened"];

  function cellKey(row, index) {
    var cell = row.cells[index];
    if (!cell) {
      return "";
    }
    var given = cell.getAttribute("data-sort");
    return given !== null ? given : cell.textContent.trim();
  }

  function compareKeys(a, b, type) {
    // Empty keys (unknown values) sort last whichever the direction; the caller flips
    // only the comparison of known values.
    if (type === "number") {
      var x = parseFloat(a);
      var y = parseFloat(b);
      return x < y ? -1 : x > y ? 1 : 0;
    }
    return a.localeCompare(b, "en", { numeric: true, sensitivity: "base" });
  }

  function sortTable(table, header, index) {
    var type = header.getAttribute("data-sort-type") || "text";
    var ascending = header.getAttribute("aria-sort") !== "ascending";
    var body = table.tBodies[0];
    if (!body) {
      return;
    }
    var rows = Array.prototype.slice.call(body.rows);
    var keyed = rows.map(function (row, position) {
      return { row: row, key: cellKey(row, index), position: position };
    });
    keyed.sort(function (p, q) {
      var pEmpty = p.key === "" || (type === "number" && isNaN(parseFloat(p.key)));
      var qEmpty = q.key === "" || (type === "number" && isNaN(parseFloat(q.key)));
      if (pEmpty !== qEmpty) {
        return pEmpty ? 1 : -1;
      }
      var order = pEmpty ? 0 : compareKeys(p.key, q.key, type);
      if (!ascending) {
        order = -order;
      }
      return order !== 0 ? order : p.position - q.position;
    });
    var fragment = document.createDocumentFragment();
    keyed.forEach(function (item) {
      fragment.appendChild(item.row);
    });
    body.appendChild(fragment);
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (cell) {
      cell.removeAttribute("aria-sort");
    });
    header.setAttribute("aria-sort", ascending ? "ascending" : "descending");
  }

  function makeSortable(table) {
    if (!table.tHead || !table.tHead.rows.length) {
      return;
    }
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (header, index) {
      var button = document.createElement("button");
      button.type = "button";
      button.className = "sort";
      while (header.firstChild) {
        button.appendChild(header.firstChild);
      }
      header.appendChild(button);
      button.addEventListener("click", function () {
        sortTable(table, header, index);
      });
    });
  }

  function readAddress() {
    var text = window.location.hash.length > 1 ? window.location.hash.slice(1)
      : window.location.search.slice(1);
    var params = new URLSearchParams(text);
    var wanted = {};
    FILTER_KEYS.forEach(function (key) {
      wanted[key] = params.get(key) || "";
    });
    return wanted;
  }

  function writeAddress(values) {
    var params = new URLSearchParams();
    FILTER_KEYS.forEach(function (key) {
      if (values[key]) {
        params.set(key, values[key]);
      }
    });
    var text = params.toString();
    // The query part is dropped: after the first change the # part holds the whole filter.
    var url = window.location.pathname + (text ? "#" + text : "");
    try {
      window.history.replaceState(null, "", url);
    } catch (error) {
      // Some browsers refuse to rewrite file:// addresses; the filter still works.
    }
  }

  function rowGroups(row) {
    try {
      var groups = JSON.parse(row.getAttribute("data-groups") || "[]");
      return Array.isArray(groups) ? groups : [];
    } catch (error) {
      return [];
    }
  }

  function setUpFilter(form) {
    var table = document.getElementById(form.getAttribute("data-table"));
    if (!table || !table.tBodies[0]) {
      return;
    }
    var rows = Array.prototype.slice.call(table.tBodies[0].rows);
    var count = document.getElementById("filter-count");
    var fields = {};
    FILTER_KEYS.forEach(function (key) {
      fields[key] = form.elements.namedItem(key);
    });

    function values() {
      var result = {};
      FILTER_KEYS.forEach(function (key) {
        result[key] = fields[key] ? fields[key].value : "";
      });
      return result;
    }

    function apply() {
      var wanted = values();
      var words = wanted.q.toLowerCase().split(/\s+/).filter(Boolean);
      var shown = 0;
      rows.forEach(function (row) {
        var search = row.getAttribute("data-search") || "";
        var match = words.every(function (word) {
          return search.indexOf(word) !== -1;
        });
        match = match && (!wanted.state || row.getAttribute("data-state") === wanted.state);
        match = match && (!wanted.rule || row.getAttribute("data-rule") === wanted.rule);
        match = match && (!wanted.group || rowGroups(row).indexOf(wanted.group) !== -1);
        match = match && (!wanted.opened || row.getAttribute("data-opened") === wanted.opened);
        row.hidden = !match;
        if (match) {
          shown += 1;
        }
      });
      if (count) {
        count.textContent = "Showing " + shown + " of " + rows.length + " alerts";
      }
      return wanted;
    }

    function fromAddress() {
      var wanted = readAddress();
      FILTER_KEYS.forEach(function (key) {
        var field = fields[key];
        if (!field) {
          return;
        }
        if (field.tagName === "SELECT") {
          var known = Array.prototype.some.call(field.options, function (option) {
            return option.value === wanted[key];
          });
          field.value = known ? wanted[key] : "";
        } else {
          field.value = wanted[key];
        }
      });
      apply();
    }

    form.addEventListener("input", function () {
      writeAddress(apply());
    });
    form.addEventListener("change", function () {
      writeAddress(apply());
    });
    form.addEventListener("submit", function (event) {
      event.preventDefault();
      writeAddress(apply());
    });
    form.addEventListener("reset", function () {
      // The reset itself happens after this event: apply once the fields are cleared.
      window.setTimeout(function () {
        writeAddress(apply());
      }, 0);
    });
    window.addEventListener("hashchange", fromAddress);
    form.hidden = false;
    fromAddress();
  }

  function copyText(text) {
    // The clipboard API needs a secure context (https, localhost); opened from disk or
    // over plain http elsewhere, fall back to selecting the text and the copy command.
    if (navigator.clipboard && window.isSecureContext) {
      return navigator.clipboard.writeText(text);
    }
    var area = document.createElement("textarea");
    area.value = text;
    area.setAttribute("readonly", "");
    area.style.position = "absolute";
    area.style.left = "-9999px";
    document.body.appendChild(area);
    area.select();
    var done = false;
    try {
      done = document.execCommand("copy");
    } catch (error) {
      done = false;
    }
    document.body.removeChild(area);
    return done ? Promise.resolve() : Promise.reject(new Error("copy refused"));
  }

  function setUpCopy(button) {
    // A copy button beside a command: shown only when this script runs (the command
    // itself is plain text in the page, selectable by hand).
    var source = document.getElementById(button.getAttribute("data-copy"));
    if (!source) {
      return;
    }
    button.addEventListener("click", function () {
      copyText(source.textContent).then(function () {
        button.textContent = "Copied";
        button.setAttribute("data-copied", "yes");
      }, function () {
        button.textContent = "Select and copy by hand";
      });
    });
    button.hidden = false;
  }

  function start() {
    Array.prototype.forEach.call(document.querySelectorAll("button.copy"), setUpCopy);
    Array.prototype.forEach.call(document.querySelectorAll("table.sortable"), makeSortable);
    Array.prototype.forEach.call(document.querySelectorAll("form.filter"), setUpFilter);
  }

  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", start);
  } else {
    start();
  }
})();
