/**
 * The service browser's state and its REST calls (`services`, `services/tables`,
 * `services/columns`, `services/find` under `<base>/jobdesk/api/`).  The widget in
 * `servicesbrowser.ts` only draws what this holds.
 */
import { URLExt } from '@jupyterlab/coreutils';
import { ServerConnection } from '@jupyterlab/services';
import { ISignal, Signal } from '@lumino/signaling';

import { deskRequest } from './model';

export interface IServiceInfo {
  service: string;
  jobs: number;
  read_at?: number | null;
  source?: string | null;
  tables?: number | null;
  columns?: number | null;
}

export interface ITableInfo {
  name: string;
  schema_name?: string | null;
  description?: string | null;
  nrows?: number | null;
  ncols: number;
}

export interface IColumnInfo {
  name: string;
  datatype?: string | null;
  arraysize?: string | null;
  unit?: string | null;
  ucd?: string | null;
  description?: string | null;
}

export interface IFindHit {
  table: string;
  column: string | null;
  unit?: string | null;
  ucd?: string | null;
  datatype?: string | null;
  description?: string | null;
}

/** Python for a new cell: a small first query on `table`, checked and estimated first. */
export function starterQuery(service: string, table: string, columns: IColumnInfo[]): string {
  const names = columns.slice(0, 8).map(c => quoteName(c.name));
  const list = names.length ? names.join(', ') : '*';
  const order = names.length ? `\nORDER BY ${names[0]}` : '';
  const adql = `SELECT TOP 100 ${list}\nFROM ${table}${order}`;
  return [
    'from jobdesk import Desk',
    '',
    'desk = Desk()',
    `service = ${JSON.stringify(service)}`,
    `adql = """${adql}"""`,
    'for finding in desk.check(service, adql):',
    '    print(finding)',
    'print(desk.estimate(service, adql))',
    'job = desk.submit(service, adql)'
  ].join('\n');
}

/** ADQL 2.1 §2.1.5: a regular identifier as is, anything else as a delimited one. */
export function quoteName(name: string): string {
  return /^[A-Za-z][A-Za-z0-9_]*$/.test(name) ? name : `"${name.replace(/"/g, '""')}"`;
}

export class ServicesModel {
  services: IServiceInfo[] = [];
  service = '';
  tables: ITableInfo[] = [];
  table = '';
  columns: IColumnInfo[] = [];
  hits: IFindHit[] = [];
  text = '';
  message = '';
  busy = false;

  private _changed = new Signal<this, void>(this);
  private settings = ServerConnection.makeSettings();

  get changed(): ISignal<this, void> {
    return this._changed;
  }

  async loadServices(): Promise<void> {
    await this.guard(async () => {
      const body = await this.request<{ services: IServiceInfo[] }>('services');
      this.services = body.services;
      if (!this.service && this.services.length) {
        this.service = this.services[0].service;
      }
    });
  }

  async choose(service: string, refresh = false): Promise<void> {
    this.service = service.trim();
    this.table = '';
    this.columns = [];
    this.hits = [];
    this.text = '';
    if (!this.service) {
      this.tables = [];
      this._changed.emit();
      return;
    }
    await this.guard(async () => {
      const query = URLExt.objectToQueryString({
        service: this.service,
        limit: 2000,
        refresh: refresh ? '1' : ''
      });
      const body = await this.request<{ tables: ITableInfo[]; warnings?: string[] }>(
        `services/tables${query}`
      );
      this.tables = body.tables;
      this.message = (body.warnings || []).join(' ');
      if (!this.services.some(s => s.service === this.service)) {
        await this.loadServices();
      }
    });
  }

  async open(table: string): Promise<void> {
    this.table = table;
    await this.guard(async () => {
      const query = URLExt.objectToQueryString({ service: this.service, table });
      const body = await this.request<{ columns: IColumnInfo[] }>(`services/columns${query}`);
      this.columns = body.columns;
    });
  }

  async find(text: string): Promise<void> {
    this.text = text;
    if (!text.trim()) {
      this.hits = [];
      this._changed.emit();
      return;
    }
    await this.guard(async () => {
      const query = URLExt.objectToQueryString({ service: this.service, text, limit: 100 });
      const body = await this.request<{ hits: IFindHit[] }>(`services/find${query}`);
      if (this.text === text) {
        this.hits = body.hits;
      }
    });
  }

  private async guard(work: () => Promise<void>): Promise<void> {
    this.busy = true;
    this.message = '';
    this._changed.emit();
    try {
      await work();
    } catch (err) {
      this.message = (err as Error).message;
    } finally {
      this.busy = false;
      this._changed.emit();
    }
  }

  request<T>(path: string): Promise<T> {
    return deskRequest<T>(this.settings, path);
  }
}
