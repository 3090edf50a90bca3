/**
 * The "TAP services" sidebar: the services this desk knows, their tables and columns (units,
 * UCDs, descriptions), a search over all of them, and a starter query for the active notebook.
 * Draws `ServicesModel`; every server call goes through the model.
 */
import { Widget } from '@lumino/widgets';

import { IColumnInfo, IFindHit, ITableInfo, ServicesModel } from './servicesmodel';

export interface IBrowserActions {
  insertQuery(table: string, columns: IColumnInfo[]): void;
}

function el<K extends keyof HTMLElementTagNameMap>(
  tag: K,
  attrs: Record<string, string> = {},
  text = ''
): HTMLElementTagNameMap[K] {
  const node = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs)) {
    node.setAttribute(k, v);
  }
  if (text) {
    node.textContent = text;
  }
  return node;
}

export class ServicesBrowser extends Widget {
  private serviceSelect = el('select', { 'aria-label': 'TAP service' });
  private urlInput = el('input', {
    type: 'url',
    placeholder: 'add a TAP service URL',
    'aria-label': 'TAP service URL'
  });
  private searchInput = el('input', {
    type: 'search',
    placeholder: 'search tables and columns',
    'aria-label': 'search tables and columns'
  });
  private status = el('div', { class: 'jd-sv-status', role: 'status' });
  private list = el('div', { class: 'jd-sv-list' });
  private searchTimer = 0;

  constructor(private model: ServicesModel, private actions: IBrowserActions) {
    super();
    this.id = 'jobdesk-services';
    this.addClass('jd-panel');
    this.addClass('jd-services');
    const bar = el('div', { class: 'jd-bar' });
    const reload = el('button', { class: 'jd-button', title: 'read the metadata again' }, 'Reload');
    bar.append(this.serviceSelect, reload);
    const add = el('div', { class: 'jd-bar' });
    const addButton = el('button', { class: 'jd-button' }, 'Open');
    add.append(this.urlInput, addButton);
    const search = el('div', { class: 'jd-bar' });
    search.append(this.searchInput);
    this.node.append(bar, add, search, this.status, this.list);

    this.serviceSelect.addEventListener('change', () => void model.choose(this.serviceSelect.value));
    reload.addEventListener('click', () => void model.choose(model.service, true));
    const open = () => {
      if (this.urlInput.value.trim()) {
        void model.choose(this.urlInput.value);
        this.urlInput.value = '';
      }
    };
    addButton.addEventListener('click', open);
    this.urlInput.addEventListener('keydown', e => e.key === 'Enter' && open());
    this.searchInput.addEventListener('input', () => {
      window.clearTimeout(this.searchTimer);
      this.searchTimer = window.setTimeout(() => void model.find(this.searchInput.value), 200);
    });
    model.changed.connect(() => this.render());
    this.render();
  }

  protected onAfterShow(): void {
    void this.model.loadServices().then(() => {
      if (this.model.service && !this.model.tables.length) {
        void this.model.choose(this.model.service);
      }
    });
  }

  private render(): void {
    const m = this.model;
    this.serviceSelect.replaceChildren(
      ...m.services.map(s => {
        const option = el('option', { value: s.service }, s.service);
        option.selected = s.service === m.service;
        return option;
      })
    );
    if (m.service && !m.services.some(s => s.service === m.service)) {
      const option = el('option', { value: m.service }, m.service);
      option.selected = true;
      this.serviceSelect.append(option);
    }
    this.status.textContent = m.busy ? 'reading…' : m.message;
    if (m.text.trim()) {
      this.list.replaceChildren(this.renderHits(m.hits));
    } else if (m.table) {
      this.list.replaceChildren(this.renderColumns(m.table, m.columns));
    } else {
      this.list.replaceChildren(this.renderTables(m.tables));
    }
  }

  private renderTables(tables: ITableInfo[]): HTMLElement {
    const box = el('ul', { class: 'jd-sv-tables', 'aria-label': 'tables' });
    if (!tables.length && this.model.service && !this.model.busy) {
      box.append(el('li', { class: 'jd-sv-empty' }, 'no tables known for this service'));
    }
    for (const t of tables) {
      const item = el('li', { class: 'jd-sv-table', tabindex: '0' });
      const rows = t.nrows !== null && t.nrows !== undefined ? ` · ${t.nrows.toLocaleString()} rows` : '';
      item.append(
        el('span', { class: 'jd-sv-name' }, t.name),
        el('span', { class: 'jd-sv-meta' }, ` ${t.ncols} columns${rows}`),
        el('div', { class: 'jd-sv-desc' }, t.description || '')
      );
      const go = () => void this.model.open(t.name);
      item.addEventListener('click', go);
      item.addEventListener('keydown', e => e.key === 'Enter' && go());
      box.append(item);
    }
    return box;
  }

  private renderColumns(table: string, columns: IColumnInfo[]): HTMLElement {
    const box = el('div', { class: 'jd-sv-columns' });
    const head = el('div', { class: 'jd-bar' });
    const back = el('button', { class: 'jd-button' }, '‹ Tables');
    const insert = el('button', { class: 'jd-button', title: 'a starter query in a new cell' },
      'Insert query');
    back.addEventListener('click', () => {
      this.model.table = '';
      this.render();
    });
    insert.addEventListener('click', () => this.actions.insertQuery(table, columns));
    head.append(back, el('strong', {}, table), insert);
    const grid = el('table', { class: 'jd-sv-grid', 'aria-label': `columns of ${table}` });
    const header = el('tr');
    for (const name of ['column', 'type', 'unit', 'UCD', 'description']) {
      header.append(el('th', { scope: 'col' }, name));
    }
    grid.append(header);
    for (const c of columns) {
      const row = el('tr');
      const type = c.datatype ? c.datatype + (c.arraysize ? `[${c.arraysize}]` : '') : '';
      for (const value of [c.name, type, c.unit || '', c.ucd || '', c.description || '']) {
        row.append(el('td', {}, value));
      }
      grid.append(row);
    }
    box.append(head, grid);
    return box;
  }

  private renderHits(hits: IFindHit[]): HTMLElement {
    const box = el('ul', { class: 'jd-sv-hits', 'aria-label': 'search results' });
    if (!hits.length && !this.model.busy) {
      box.append(el('li', { class: 'jd-sv-empty' }, 'nothing matches'));
    }
    for (const h of hits) {
      const item = el('li', { class: 'jd-sv-table', tabindex: '0' });
      const name = h.column ? `${h.table}.${h.column}` : h.table;
      const facts = [h.datatype, h.unit, h.ucd].filter(Boolean).join(' · ');
      item.append(
        el('span', { class: 'jd-sv-name' }, name),
        el('span', { class: 'jd-sv-meta' }, facts ? ` ${facts}` : ''),
        el('div', { class: 'jd-sv-desc' }, h.description || '')
      );
      const go = () => {
        this.searchInput.value = '';
        this.model.text = '';
        void this.model.open(h.table);
      };
      item.addEventListener('click', go);
      item.addEventListener('keydown', e => e.key === 'Enter' && go());
      box.append(item);
    }
    return box;
  }
}
