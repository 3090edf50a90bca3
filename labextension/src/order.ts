/**
 * The sidebar's order controls: sort (by the server, so it holds over every page) and the
 * notebook / analysis menus, each entry with its jobs and the cache its results use.
 */
import { baseName, formatBytes } from './format';
import { IGroups, JobDeskModel } from './model';

export const SORTS: Array<[string, string]> = [
  ['Newest first', 'created'],
  ['Recently finished', 'finished'],
  ['Most rows', 'rows'],
  ['Largest', 'size']
];

const ALL = '\u0000all';

export class OrderBar {
  readonly node = document.createElement('div');

  constructor(private readonly model: JobDeskModel) {
    this.node.className = 'jd-order';
    this.sort.className = 'jd-sort';
    this.sort.setAttribute('aria-label', 'Sort jobs');
    for (const [label, value] of SORTS) {
      this.sort.append(option(label, value));
    }
    this.sort.addEventListener('change', () => void model.setFilter({ sort: this.sort.value }));
    this.notebook.className = 'jd-notebook-filter';
    this.notebook.setAttribute('aria-label', 'Show jobs of notebook');
    this.notebook.addEventListener('change', () => {
      const value = this.notebook.value;
      void model.setFilter({ notebook: value === ALL ? undefined : value });
    });
    this.analysis.className = 'jd-analysis-filter';
    this.analysis.setAttribute('aria-label', 'Show jobs of analysis');
    this.analysis.addEventListener('change', () => {
      const value = this.analysis.value;
      void model.setFilter({ analysis: value === ALL ? undefined : value });
    });
    this.node.append(this.sort, this.notebook, this.analysis);
    model.changed.connect(() => this.render());
    this.render();
  }

  render(): void {
    const groups = this.model.groups;
    fill(this.notebook, groups.notebook, 'All notebooks', 'no notebook', this.model.filter.notebook);
    fill(this.analysis, groups.analysis, 'All analyses', 'no analysis', this.model.filter.analysis);
    this.notebook.hidden = !groups.notebook?.groups.length;
    this.analysis.hidden = !(groups.analysis?.available && groups.analysis.groups.length);
  }

  private sort = document.createElement('select');
  private notebook = document.createElement('select');
  private analysis = document.createElement('select');
}

/** Rebuild a group menu only when its entries changed (a rebuild would close an open menu). */
function fill(
  select: HTMLSelectElement,
  groups: IGroups | null,
  allLabel: string,
  noneLabel: string,
  current: string | undefined
): void {
  const entries: Array<[string, string, string]> = [[allLabel, ALL, '']];
  for (const g of groups?.groups ?? []) {
    const name = g.value ? baseName(g.value) : noneLabel;
    const cache = g.cached ? `, ${formatBytes(g.bytes)} cached` : '';
    entries.push([`${name} — ${g.jobs} job${g.jobs === 1 ? '' : 's'}${cache}`, g.value, g.value]);
  }
  const signature = JSON.stringify(entries);
  if (select.dataset.signature !== signature) {
    select.replaceChildren(
      ...entries.map(([label, value, full]) => {
        const node = option(label, value);
        if (full) {
          node.title = full;
        }
        return node;
      })
    );
    select.dataset.signature = signature;
  }
  select.value = current === undefined ? ALL : current;
}

function option(label: string, value: string): HTMLOptionElement {
  const node = document.createElement('option');
  node.value = value;
  node.textContent = label;
  return node;
}
